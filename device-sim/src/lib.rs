//! Plimsoll device side.
