//! Empty library: this package exists for its integration test binary (`main.rs`).
