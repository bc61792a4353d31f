//! Not written yet: constructing this method panics (work in progress on branch `ode`).

use super::{HybridSystem, OdeError, Stats, Stepper};

pub(super) struct TrBdf2;

impl TrBdf2 {
    pub(super) fn new(_rtol: f64, _atol: f64, _max_step: f64, _n: usize) -> Self {
        unimplemented!("TrBdf2 integrator being written")
    }
}

impl<S: HybridSystem> Stepper<S> for TrBdf2 {
    fn choose_step(&mut self, _: &S, _: f64, _: &[f64], _: f64, _: &mut Stats) -> (f64, bool) {
        unreachable!()
    }
    fn attempt(
        &mut self,
        _: &S,
        _: f64,
        _: &[f64],
        _: f64,
        _: &mut [f64],
        _: &mut Stats,
    ) -> Result<bool, OdeError> {
        unreachable!()
    }
    fn trial(
        &mut self,
        _: &S,
        _: f64,
        _: &[f64],
        _: f64,
        _: &mut [f64],
        _: &mut Stats,
    ) -> Result<(), OdeError> {
        unreachable!()
    }
    fn accepted(&mut self, _: bool) {}
    fn discontinuity(&mut self) {}
}
