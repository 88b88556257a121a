"""A minimal Plimsoll device in Python: the example for device makers.

It speaks only the public contract in proto/plimsoll/v1/aggregator.proto over
gRPC with TLS, with stubs generated from that file:

    python -m grpc_tools.protoc -I proto --python_out=STUBS \
        --grpc_python_out=STUBS proto/plimsoll/v1/aggregator.proto

and then takes part in a study the way every device does: it enrols with the
study's enrollment code and a 256-bit secret it draws itself (sent once; every
later call carries `authorization: Bearer <device_id>.<secret>`), fetches its
tasks (long-polling), submits one update per round and, when the study is
done, fetches the published prior.

What it submits is deliberately simple: the round's shared parameters
unchanged, with the device's day count and a local loss given on the command
line. A real device trains the parameters on its own days first (as the Rust
device in device-sim/src/training.rs does); the aggregator's checks and
weighting are the same either way. No daily value leaves the device: an update
holds parameters, a day count and one loss per signal.

Prints one JSON line when done: device id, rounds taken part in, prior version.
"""

import argparse
import json
import os
import secrets
import sys
import time


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--target", required=True, help="host:port of the aggregator")
    parser.add_argument("--ca", required=True, help="PEM file of the authority that signed its certificate")
    parser.add_argument("--study", required=True)
    parser.add_argument("--participant", required=True, help="pseudonymous label, [A-Za-z0-9_-]{1,64}")
    parser.add_argument("--stubs", required=True, help="folder holding the generated plimsoll/v1 stubs")
    parser.add_argument("--days", type=int, default=30, help="days of data the update stands for")
    parser.add_argument("--local-loss", type=float, default=1.0, help="mean local loss per day to report")
    parser.add_argument("--timeout-s", type=float, default=120.0, help="give up after this long")
    parser.add_argument("--sensor-model", default="", help="this device's sensor model, when the study lists models (Study.sensor_models)")
    parser.add_argument("--group-label", default="", help="the participant's level of Study.group_column, when the study names one")
    args = parser.parse_args()

    sys.path.insert(0, args.stubs)
    import grpc
    from plimsoll.v1 import aggregator_pb2 as pb
    from plimsoll.v1 import aggregator_pb2_grpc as rpc

    code = os.environ.get("PLIMSOLL_ENROLLMENT_CODE")
    if not code:
        print("PLIMSOLL_ENROLLMENT_CODE is not set", file=sys.stderr)
        return 2
    with open(args.ca, "rb") as f:
        credentials = grpc.ssl_channel_credentials(root_certificates=f.read())
    channel = grpc.secure_channel(args.target, credentials)
    stub = rpc.AggregatorStub(channel)

    study = stub.GetStudy(pb.GetStudyRequest(study_id=args.study), timeout=10)
    secret = secrets.token_hex(32)  # 256 bits as 64 lower-case hex characters
    enrolled = stub.Enroll(
        pb.EnrollRequest(
            study_id=args.study,
            participant_label=args.participant,
            signals=[s.signal for s in study.signals],
            consent_share_flags=False,
            enrollment_code=code,
            device_secret=secret,
            sensor_model=args.sensor_model,
            group_label=args.group_label,
        ),
        timeout=10,
    )
    device_id = enrolled.device_id
    metadata = [("authorization", f"Bearer {device_id}.{secret}")]

    rounds = 0
    deadline = time.monotonic() + args.timeout_s
    while time.monotonic() < deadline:
        answer = stub.FetchTask(
            pb.FetchTaskRequest(study_id=args.study, device_id=device_id, wait_ms=2000),
            metadata=metadata,
            timeout=10,
        )
        work = answer.WhichOneof("work")
        if work == "task":
            task = answer.task
            updates = [
                pb.SignalUpdate(
                    signal=p.signal,
                    values=list(p.values),
                    n_days=args.days,
                    local_loss=args.local_loss,
                )
                for p in task.shared
            ]
            stub.SubmitUpdate(
                pb.SubmitUpdateRequest(
                    study_id=args.study,
                    device_id=device_id,
                    round_id=task.round_id,
                    updates=updates,
                ),
                metadata=metadata,
                timeout=10,
            )
            rounds += 1
        elif work == "wait":
            # The long poll already waited; a short pause keeps a busy loop off the server.
            time.sleep(min(answer.wait.retry_after_ms, 1000) / 1000.0)
        elif work == "done":
            prior = stub.GetPrior(
                pb.GetPriorRequest(study_id=args.study, version=answer.done.prior_version),
                metadata=metadata,
                timeout=10,
            )
            print(
                json.dumps(
                    {
                        "device_id": device_id,
                        "rounds": rounds,
                        "prior_version": prior.version,
                        "signals": [p.signal for p in prior.params],
                    }
                )
            )
            return 0
        else:
            print(f"FetchTask answered without work: {answer}", file=sys.stderr)
            return 1
    print(f"the study was not done within {args.timeout_s} s", file=sys.stderr)
    return 1


if __name__ == "__main__":
    sys.exit(main())
