pub mod fit;
pub mod reduce;
