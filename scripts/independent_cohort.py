#!/usr/bin/env python3
"""A cohort written independently of the project's simulator, for checking detection
when the model is wrong.

It shares nothing with `device-sim/src/cohort/simulate.rs` but the CSV contract
(docs/data-format.md). On purpose it breaks the shared prior's assumptions in ways real
wearable data does:

- day-to-day correlation: an AR(1) daily state (phi 0.75) on every signal, plus a slow
  random-walk drift;
- heavy tails: measurement noise is Student-t with 3 degrees of freedom;
- device differences: three device models with different noise scales and offsets; one of
  them has no respiratory-rate sensor;
- late enrolment: a quarter of the participants start between day 30 and day 150;
- confounders: drinking nights (mostly Friday and Saturday; resting HR up, HRV down, skin
  temperature up, shorter sleep), hard-training blocks (1 to 3 weeks; resting HR up, HRV down,
  steps up) and short trips (sleep and steps disturbed);
- mild acute illness: about 1.5 episodes per participant-year, 4 to 10 days, with peak effects
  about half of a typical febrile illness, ramping up over 1 to 3 days before symptoms.

Every number here is an illustrative choice of this script ("common practice" orders of
magnitude, from memory), not a measurement. The data are invented, for testing only.

Usage: scripts/independent_cohort.py OUT_DIR [--participants N] [--days D] [--seed S]
Plain Python 3, no packages.
"""

import argparse
import csv
import datetime as dt
import math
import os
import random


def student_t(rng, df):
    """A Student-t draw scaled to unit variance."""
    z = rng.gauss(0.0, 1.0)
    chi2 = sum(rng.gauss(0.0, 1.0) ** 2 for _ in range(df))
    return z / math.sqrt(chi2 / df) / math.sqrt(df / (df - 2))


DEVICES = {
    # noise multiplier, offsets (resting HR bpm, skin temp C), has respiratory rate
    "wrist-x": (1.0, 0.0, 0.0, True),
    "wrist-y": (1.6, 1.5, 0.1, True),
    "ring-z": (0.7, -0.5, -0.05, False),
}


def bump(day, start, peak, end):
    """Triangular-then-exponential shape: 0 before start, 1 at peak, decaying to ~0 at end."""
    if day < start or day > end:
        return 0.0
    if day <= peak:
        return (day - start + 1) / (peak - start + 1)
    return math.exp(-2.5 * (day - peak) / max(1, end - peak))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("out")
    ap.add_argument("--participants", type=int, default=300)
    ap.add_argument("--days", type=int, default=240)
    ap.add_argument("--seed", type=int, default=7)
    args = ap.parse_args()
    rng = random.Random(args.seed)
    os.makedirs(args.out, exist_ok=True)
    origin = dt.date(2025, 3, 3)
    daily = open(os.path.join(args.out, "daily.csv"), "w", newline="")
    dw = csv.writer(daily)
    dw.writerow(["participant", "date", "resting_hr_bpm", "hrv_rmssd_ms", "sleep_h",
                 "skin_temp_delta_c", "steps", "resp_rate_brpm"])
    people = open(os.path.join(args.out, "participants.csv"), "w", newline="")
    pw = csv.writer(people)
    pw.writerow(["participant", "device_model", "enrolment"])
    events = open(os.path.join(args.out, "events.csv"), "w", newline="")
    ew = csv.writer(events)
    ew.writerow(["participant", "kind", "start", "end", "symptom_onset"])

    for p in range(args.participants):
        pid = f"x{p:04d}"
        device = rng.choice(list(DEVICES))
        noise_mult, hr_off, temp_off, has_resp = DEVICES[device]
        late = rng.random() < 0.25
        first = rng.randint(30, 150) if late else 0
        pw.writerow([pid, device, "late" if late else "on_time"])
        base = {
            "hr": rng.gauss(62, 7) + hr_off,
            "lhrv": math.log(40) + rng.gauss(0, 0.35),
            "sleep": rng.gauss(7.0, 0.5),
            "temp": rng.gauss(0.0, 0.1) + temp_off,
            "lsteps": math.log(8000) + rng.gauss(0, 0.35),
            "resp": rng.gauss(14.5, 1.2),
        }
        # Day-to-day state SDs and noise SDs (per signal).
        state_sd = {"hr": 1.8, "lhrv": 0.12, "sleep": 0.7, "temp": 0.10, "lsteps": 0.30, "resp": 0.25}
        noise_sd = {"hr": 1.0, "lhrv": 0.08, "sleep": 0.3, "temp": 0.07, "lsteps": 0.05, "resp": 0.25}
        drift_sd = {"hr": 0.08, "lhrv": 0.004, "sleep": 0.01, "temp": 0.003, "lsteps": 0.006, "resp": 0.01}
        state = {k: 0.0 for k in base}
        drift = {k: 0.0 for k in base}
        drinker = rng.random()  # drinking-night propensity
        effects = [dict() for _ in range(args.days)]

        def add(day, key, value):
            if 0 <= day < args.days:
                effects[day][key] = effects[day].get(key, 0.0) + value

        # Illness: Poisson-ish, at least 10 days apart.
        day = first + int(rng.expovariate(1.5 / 365.0))
        while day < args.days:
            start = day
            pre = rng.randint(1, 3)
            peak = start + pre + rng.randint(0, 2)
            end = peak + rng.randint(2, 6)
            end = min(end, args.days - 1)
            onset = start + pre
            sev = rng.uniform(0.35, 0.8)
            for d in range(start, end + 1):
                b = bump(d, start, peak, end) * sev
                add(d, "hr", 7.0 * b)
                add(d, "lhrv", -0.3 * b)
                add(d, "temp", 0.6 * b)
                add(d, "resp", 1.2 * b)
                add(d, "sleep", 0.6 * b)
                add(d, "lsteps", -0.5 * b)
            if start >= first:
                ew.writerow([pid, "acute_illness", (origin + dt.timedelta(start)).isoformat(),
                             (origin + dt.timedelta(end)).isoformat(),
                             (origin + dt.timedelta(min(onset, end))).isoformat()])
            day = end + 10 + int(rng.expovariate(1.5 / 365.0))
        # Training blocks.
        day = rng.randint(0, 120)
        while day < args.days and rng.random() < 0.7:
            length = rng.randint(7, 21)
            for d in range(day, min(args.days, day + length)):
                add(d, "hr", 2.5)
                add(d, "lhrv", -0.10)
                add(d, "lsteps", 0.35)
            if day >= first:
                ew.writerow([pid, "training_block", (origin + dt.timedelta(day)).isoformat(),
                             (origin + dt.timedelta(min(args.days - 1, day + length - 1))).isoformat(), ""])
            day += length + rng.randint(40, 140)
        # Trips.
        for _ in range(rng.randint(0, 2)):
            d0 = rng.randint(0, args.days - 5)
            for d in range(d0, d0 + 4):
                add(d, "sleep", rng.gauss(-0.8, 0.5))
                add(d, "lsteps", rng.gauss(0.2, 0.2))
                add(d, "hr", 1.0)
        # Drinking nights: the day of waking after.
        for d in range(args.days):
            weekday = (origin + dt.timedelta(d)).weekday()
            p_night = (0.35 if weekday in (5, 6) else 0.04) * drinker
            if rng.random() < p_night:
                size = rng.uniform(0.5, 1.5)
                add(d, "hr", 4.0 * size)
                add(d, "lhrv", -0.2 * size)
                add(d, "temp", 0.15 * size)
                add(d, "sleep", -0.8 * size)
                add(d, "resp", 0.3 * size)
                add(d + 1, "hr", 1.0 * size)

        for d in range(args.days):
            for k in base:
                state[k] = 0.75 * state[k] + math.sqrt(1 - 0.75**2) * state_sd[k] * rng.gauss(0, 1)
                drift[k] += drift_sd[k] * rng.gauss(0, 1)
            if d < first or rng.random() < 0.05:
                continue
            weekday = (origin + dt.timedelta(d)).weekday()
            weekend = weekday >= 5

            def value(k, extra=0.0):
                noise = noise_sd[k] * noise_mult * student_t(rng, 3)
                return base[k] + drift[k] + state[k] + effects[d].get(k, 0.0) + extra + noise

            hr = value("hr")
            hrv = math.exp(value("lhrv"))
            sleep = value("sleep", 0.5 if weekend else 0.0)
            temp = value("temp")
            steps = math.exp(value("lsteps", -0.15 if weekend else 0.0))
            resp = value("resp") if has_resp else None
            row = [pid, (origin + dt.timedelta(d)).isoformat(),
                   f"{min(200, max(30, hr)):.1f}", f"{min(250, max(3, hrv)):.1f}",
                   f"{min(14, max(1, sleep)):.2f}", f"{min(4, max(-4, temp)):.2f}",
                   f"{int(min(60000, steps))}", "" if resp is None else f"{min(50, max(6, resp)):.1f}"]
            if rng.random() < 0.02:
                row[rng.randint(2, 7)] = ""
            dw.writerow(row)
    daily.close()
    people.close()
    events.close()


if __name__ == "__main__":
    main()
