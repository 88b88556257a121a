//! Integration tests, compiled as one binary.
