//! Signals: traces of fault responses, their files, and recordings.
pub mod comtrade;
pub mod phasor;
pub mod recording;
pub mod trace;
