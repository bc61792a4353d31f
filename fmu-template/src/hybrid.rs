//! The hybrid surrogate in co-simulation: reduced block-model physics plus the linear
//! correction ([`crate::correction`]). Output = physics output + correction output; the current
//! correction (C z + D u, u from the present inputs) is rotated to the network frame and P, Q follow from S = v·conj(i).
//!
//! The block model runs at its own internal step (`internal_step_s`, the step it was fitted at)
//! with the host's input held; the correction is stepped exactly over the host's step, its
//! inputs (the terminal voltage and the physics' current at the start of the step) held.

use crate::block::{BlockModel, BlockRun, InitialOutputs, Sample, SimulatorSnapshot, Template};
use crate::correction::{in_dip, Correction, CorrectionStepper, PreFault, PreFaultFrame};
use crate::cosim::{CoSimError, CoSimModel, Inputs, Outputs, Setpoints};
use serde::{Deserialize, Serialize};
use std::cell::{Cell, RefCell};

/// The operating points seen in training (pu); reported, and part of the training envelope.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct OperatingRange {
    pub p_min: f64,
    pub p_max: f64,
    pub q_min: f64,
    pub q_max: f64,
}

/// A hybrid model ready to run.
#[derive(Debug, Clone)]
pub struct HybridCoSim {
    model: BlockModel,
    free: Vec<f64>,
    internal_step_s: f64,
    correction: CorrectionStepper,
    running: Option<Live>,
    /// signals of the output probe, reused so that `outputs` allocates nothing
    probe: RefCell<Vec<f64>>,
    /// what the probe was computed for and the outputs it gave: a host's get between two
    /// steps is answered once, and the following doStep reuses the probe's signals instead of
    /// evaluating the same sample again; valid only while its key's epoch is the present one
    probed: Cell<Option<(ProbeKey, Probed)>>,
    /// bumped by every change of the running state (initialise, do_step, restore_state), which
    /// is what makes an earlier probe stale
    epoch: u64,
}

/// What a probe found: the correction's input vector (from the inputs and the physics'
/// current, bounded) and the hybrid's outputs.
type Probed = ([f64; crate::correction::N_INPUTS], Outputs);

/// The state (by its epoch) and the exact inputs a probe was evaluated at.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
struct ProbeKey {
    epoch: u64,
    inputs: [u64; 3],
}

impl ProbeKey {
    fn new(epoch: u64, inputs: &Inputs) -> Self {
        Self {
            epoch,
            inputs: [
                inputs.v_re.to_bits(),
                inputs.v_im.to_bits(),
                inputs.f_grid.to_bits(),
            ],
        }
    }
}

/// The running hybrid, held ready to step (no snapshot round trip per step).
#[derive(Debug, Clone)]
struct Live {
    block: BlockRun<f64>,
    block_steps: u64,
    elapsed_s: f64,
    z: Vec<f64>,
    /// the correction's state of a step in progress (kept only when finite)
    z_trial: Vec<f64>,
    pre_fault: PreFaultFrame,
}

/// Everything of a [`HybridCoSim`] that evolves (nothing before initialisation).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct HybridState {
    pub running: Option<HybridRunning>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct HybridRunning {
    pub block: SimulatorSnapshot,
    /// internal steps the block model has taken since initialisation
    pub block_steps: u64,
    /// host time reached (s, from initialisation)
    pub elapsed_s: f64,
    pub z: Vec<f64>,
    pub pre_fault: PreFault,
}

impl HybridCoSim {
    /// `communication_step_s`: the host step the model expects (its natural step); the
    /// correction is discretised for it here, not in the first step.
    pub fn new(
        template: &Template,
        internal_step_s: f64,
        correction: &Correction,
        communication_step_s: f64,
    ) -> Result<Self, CoSimError> {
        let model = BlockModel::compile(template)
            .map_err(|e| CoSimError::ModelFile(format!("hybrid template: {e}")))?;
        if !(internal_step_s.is_finite() && internal_step_s > 0.0) {
            return Err(CoSimError::BadValue {
                field: "internal_step_s".into(),
                value: internal_step_s,
                expected: "an internal step > 0 s".into(),
            });
        }
        let mut correction =
            CorrectionStepper::new(correction).map_err(|e| CoSimError::ModelFile(e.to_string()))?;
        if communication_step_s.is_finite() && communication_step_s > 0.0 {
            correction.prepare(communication_step_s);
        }
        Ok(Self {
            free: model.free_parameter_values(),
            probe: RefCell::new(Vec::with_capacity(model.signal_names().len())),
            probed: Cell::new(None),
            epoch: 0,
            model,
            internal_step_s,
            correction,
            running: None,
        })
    }

    pub fn correction_order(&self) -> usize {
        self.correction.order()
    }

    /// What the last probe found, when it was made for `key` (this state, these inputs).
    fn probe_for(&self, key: &ProbeKey) -> Option<Probed> {
        self.probed
            .get()
            .and_then(|(k, probed)| (k == *key).then_some(probed))
    }
}

/// What the correction sees at host inputs `inputs` and the physics' current `physics`
/// (i_re, i_im): its input vector, held inside its training range.
fn correction_input(
    correction: &CorrectionStepper,
    frame: &PreFaultFrame,
    inputs: &Inputs,
    physics: (f64, f64),
) -> [f64; crate::correction::N_INPUTS] {
    correction.bounded(frame.input(inputs.v_re, inputs.v_im, inputs.f_grid, physics))
}

fn sample(inputs: &Inputs) -> Sample {
    Sample {
        v_re: inputs.v_re,
        v_im: inputs.v_im,
        f_grid: inputs.f_grid,
    }
}

impl CoSimModel for HybridCoSim {
    type State = HybridState;

    fn initialise(&mut self, inputs: &Inputs, setpoints: &Setpoints) -> Result<(), CoSimError> {
        inputs.validate()?;
        let v = inputs.voltage();
        let initial = InitialOutputs::from_power(v.re, v.im, setpoints.p_ref, setpoints.q_ref);
        let block = BlockRun::new(
            &self.model,
            &self.free,
            sample(inputs),
            &initial,
            self.internal_step_s,
            1,
        );
        let n = self.correction.order();
        self.epoch += 1;
        self.running = Some(Live {
            block,
            block_steps: 0,
            elapsed_s: 0.0,
            z: vec![0.0; n],
            z_trial: vec![0.0; n],
            pre_fault: PreFault {
                u0: v.norm(),
                theta0: v.arg(),
                f0: inputs.f_grid,
                p0: setpoints.p_ref,
                q0: setpoints.q_ref,
            }
            .frame(),
        });
        Ok(())
    }

    fn do_step(&mut self, _t_s: f64, h_s: f64, inputs: &Inputs) -> Result<(), CoSimError> {
        inputs.validate()?;
        if !(h_s.is_finite() && h_s > 0.0) {
            return Err(CoSimError::BadValue {
                field: "h_s".into(),
                value: h_s,
                expected: "a communication step > 0 s".into(),
            });
        }
        let key = ProbeKey::new(self.epoch, inputs);
        let probed = self.probe_for(&key).map(|(u, _)| u);
        let running = self
            .running
            .as_mut()
            .ok_or(CoSimError::NotInitialised { call: "do_step" })?;
        // the physics' current at this sample is an input of the correction: the input vector
        // a get left at this state and these inputs, or one from a probe made here (which the
        // first block step then takes over, so it costs no extra evaluation)
        let u = match probed {
            Some(u) => u,
            None => {
                // the probe's signals change: an earlier probe no longer stands behind them
                self.probed.set(None);
                let [i_re, i_im, _, _] =
                    running
                        .block
                        .peek(&self.model, sample(inputs), self.probe.get_mut());
                correction_input(&self.correction, &running.pre_fault, inputs, (i_re, i_im))
            }
        };
        // the correction first, on a copy: a failed step changes nothing
        let finite = self
            .correction
            .step_from(&running.z, &mut running.z_trial, &u, h_s);
        if !finite {
            return Err(CoSimError::BadValue {
                field: "correction state".into(),
                value: f64::NAN,
                expected: "finite values after the step".into(),
            });
        }
        std::mem::swap(&mut running.z, &mut running.z_trial);
        self.epoch += 1;
        let target = running.elapsed_s + h_s;
        // the block model steps at its internal step while a whole step fits before the
        // target (a relative slack absorbs rounding of sums of host steps); the first step
        // takes the signals of the probe made at this state and these inputs
        let h = self.internal_step_s;
        let s = sample(inputs);
        let mut from_probe = true;
        while (running.block_steps + 1) as f64 * h <= target + 1e-9 * h {
            if std::mem::take(&mut from_probe) {
                running
                    .block
                    .step_from_probe(&self.model, self.probe.get_mut());
            } else {
                running.block.step(&self.model, s);
            }
            running.block_steps += 1;
        }
        running.elapsed_s = target;
        Ok(())
    }

    fn outputs(&self, inputs: &Inputs) -> Result<Outputs, CoSimError> {
        let running = self
            .running
            .as_ref()
            .ok_or(CoSimError::NotInitialised { call: "outputs" })?;
        let key = ProbeKey::new(self.epoch, inputs);
        if let Some((_, outputs)) = self.probe_for(&key) {
            return Ok(outputs);
        }
        let [i_re, i_im, p, q] =
            running
                .block
                .peek(&self.model, sample(inputs), &mut self.probe.borrow_mut());
        let u = correction_input(&self.correction, &running.pre_fault, inputs, (i_re, i_im));
        let (di_d, di_q) = self
            .correction
            .output(&running.z, &u, in_dip(inputs.v_re, inputs.v_im));
        let (di_re, di_im) = running.pre_fault.to_network(di_d, di_q);
        let outputs =
            Outputs { i_re, i_im, p, q }.plus_current(inputs.v_re, inputs.v_im, di_re, di_im);
        self.probed.set(Some((key, (u, outputs))));
        Ok(outputs)
    }

    fn save_state(&self) -> HybridState {
        HybridState {
            running: self.running.as_ref().map(|r| HybridRunning {
                block: r.block.snapshot(),
                block_steps: r.block_steps,
                elapsed_s: r.elapsed_s,
                z: r.z.clone(),
                pre_fault: r.pre_fault.pre_fault,
            }),
        }
    }

    fn restore_state(&mut self, state: &HybridState) -> Result<(), CoSimError> {
        let Some(r) = &state.running else {
            self.epoch += 1;
            self.running = None;
            return Ok(());
        };
        let block = BlockRun::resume(&self.model, &self.free, &r.block, self.internal_step_s, 1)
            .ok_or_else(|| {
                CoSimError::BadState("block-model state does not fit the hybrid's template".into())
            })?;
        if r.z.len() != self.correction.order() || r.z.iter().any(|z| !z.is_finite()) {
            return Err(CoSimError::BadState(format!(
                "expected {} finite correction states, found {}",
                self.correction.order(),
                r.z.len()
            )));
        }
        self.epoch += 1;
        self.running = Some(Live {
            block,
            block_steps: r.block_steps,
            elapsed_s: r.elapsed_s,
            z: r.z.clone(),
            z_trial: r.z.clone(),
            pre_fault: r.pre_fault.frame(),
        });
        Ok(())
    }
}
