//! The FMU's variables: one table shared by the runtime (which serves them) and the exporter
//! (which describes them in `modelDescription.xml`), so the two can never disagree.
//!
//! Per unit on the model file's bases (`s_base_mva`, `v_base_kv`); phasors in the host's
//! network frame; generator convention.

/// Value references.
pub mod vr {
    pub const V_RE: u32 = 0;
    pub const V_IM: u32 = 1;
    pub const F_GRID: u32 = 2;
    pub const I_RE: u32 = 3;
    pub const I_IM: u32 = 4;
    pub const P: u32 = 5;
    pub const Q: u32 = 6;
    pub const P_REF: u32 = 7;
    pub const Q_REF: u32 = 8;
    pub const S_BASE_MVA: u32 = 9;
    pub const V_BASE_KV: u32 = 10;
    pub const OUT_OF_ENVELOPE: u32 = 11;
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum VarType {
    Real,
    Boolean,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Causality {
    /// Set by the host each communication step; held over the step.
    Input,
    /// Computed by the model.
    Output,
    /// Fixed before initialisation.
    Parameter,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Variable {
    pub name: &'static str,
    pub vr: u32,
    pub ty: VarType,
    pub causality: Causality,
    pub unit: Option<&'static str>,
    pub description: &'static str,
}

const fn real(
    name: &'static str,
    vr: u32,
    causality: Causality,
    unit: &'static str,
    description: &'static str,
) -> Variable {
    Variable {
        name,
        vr,
        ty: VarType::Real,
        causality,
        unit: Some(unit),
        description,
    }
}

/// Every variable, in the order of `ModelVariables` (its 1-based position is its index in
/// `ModelStructure`).
pub const VARIABLES: [Variable; 12] = [
    real("v_re", vr::V_RE, Causality::Input, "pu", "Terminal voltage phasor, real part (network frame)"),
    real("v_im", vr::V_IM, Causality::Input, "pu", "Terminal voltage phasor, imaginary part (network frame)"),
    real("f_grid", vr::F_GRID, Causality::Input, "pu", "Grid frequency (pu of the nominal frequency)"),
    real("i_re", vr::I_RE, Causality::Output, "pu", "Injected current phasor, real part (generator convention)"),
    real("i_im", vr::I_IM, Causality::Output, "pu", "Injected current phasor, imaginary part (generator convention)"),
    real("p", vr::P, Causality::Output, "pu", "Active power injected at the terminal"),
    real("q", vr::Q, Causality::Output, "pu", "Reactive power injected at the terminal (positive = capacitive)"),
    real("p_ref", vr::P_REF, Causality::Parameter, "pu", "Active power setpoint (initial operating point)"),
    real("q_ref", vr::Q_REF, Causality::Parameter, "pu", "Reactive power setpoint"),
    real("s_base_mva", vr::S_BASE_MVA, Causality::Parameter, "MVA", "Power base: the unit rating (fixed by the model)"),
    real("v_base_kv", vr::V_BASE_KV, Causality::Parameter, "kV", "Voltage base: nominal line-to-line terminal voltage (fixed by the model)"),
    Variable {
        name: "out_of_envelope",
        vr: vr::OUT_OF_ENVELOPE,
        ty: VarType::Boolean,
        causality: Causality::Output,
        unit: None,
        description: "Rises when the inputs leave the model's declared envelope and stays up for the rest of the run",
    },
];

/// The variable of type `ty` with value reference `vr`, if any.
pub fn find(ty: VarType, vr: u32) -> Option<&'static Variable> {
    VARIABLES.iter().find(|v| v.ty == ty && v.vr == vr)
}
