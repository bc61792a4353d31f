//! The one integration-test binary: every module below drives the library or the real CLI.
//! External checks name their published source beside the numbers.

mod blocks;
mod common;
mod comtrade;
mod fmi;
mod fmi3;
mod fmi_import;
mod full_converter;
mod hybrid;
mod mbam;
mod ode;
mod recording;
mod reduction;
mod residual;
mod simulate_cli;
