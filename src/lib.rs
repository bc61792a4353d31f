pub mod residual;
