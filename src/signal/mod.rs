//! Recorded and simulated signals: COMTRADE exchange files and phasor extraction.

pub mod comtrade;
pub mod phasor;
