
pub mod residual;
