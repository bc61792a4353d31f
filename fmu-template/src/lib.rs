pub mod ode;
