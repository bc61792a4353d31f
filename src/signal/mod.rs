//! Signals: traces of fault responses, their files, and recordings.
pub mod trace;
