//! Plimsoll aggregator library.
