//! The catalogue of block kinds: ports, settings, outputs and states of each.

/// When a block reads an input port.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct PortUse {
    /// needed to compute the block's output at the same step (direct feedthrough)
    pub now: bool,
    /// needed to compute the block's output at initialisation
    pub init: bool,
    pub required: bool,
}

const NOW: PortUse = PortUse {
    now: true,
    init: true,
    required: true,
};
/// read only by the state update (and at initialisation)
const LATE: PortUse = PortUse {
    now: false,
    init: true,
    required: true,
};
/// feedthrough, but the output at initialisation does not need it (set from the state)
const NOW_NOT_INIT: PortUse = PortUse {
    now: true,
    init: false,
    required: true,
};
/// read only by the state update; the output at initialisation does not need it
const STATE_ONLY: PortUse = PortUse {
    now: false,
    init: false,
    required: true,
};
const OPTIONAL_LATE: PortUse = PortUse {
    now: false,
    init: false,
    required: false,
};
const OPTIONAL_INIT: PortUse = PortUse {
    now: false,
    init: true,
    required: false,
};
const OPTIONAL_NOW: PortUse = PortUse {
    now: true,
    init: true,
    required: false,
};

/// What a kind of block looks like from outside.
#[derive(Debug, Clone, Copy)]
pub struct KindInfo {
    pub kind: &'static str,
    pub inputs: &'static [(&'static str, PortUse)],
    /// settings and whether each is required
    pub params: &'static [(&'static str, bool)],
    /// output ports; empty means one output named after the block
    pub outputs: &'static [&'static str],
    /// continuous states
    pub states: usize,
    /// one-sample memories (switch flags, delays, held values)
    pub memories: usize,
    /// `sum` and `product` take their inputs from `terms`
    pub uses_terms: bool,
    pub options: &'static [&'static str],
    /// the output depends on the state only (breaks algebraic loops)
    pub state_output: bool,
}

const fn info(kind: &'static str) -> KindInfo {
    KindInfo {
        kind,
        inputs: &[],
        params: &[],
        outputs: &[],
        states: 0,
        memories: 0,
        uses_terms: false,
        options: &[],
        state_output: false,
    }
}

/// Every kind the engine knows.
pub const KINDS: &[KindInfo] = &[
    KindInfo {
        params: &[("value", true)],
        ..info("constant")
    },
    KindInfo {
        options: &["initial"],
        ..info("setpoint")
    },
    KindInfo {
        inputs: &[("u", NOW)],
        params: &[("k", true)],
        ..info("gain")
    },
    KindInfo {
        uses_terms: true,
        ..info("sum")
    },
    KindInfo {
        uses_terms: true,
        ..info("product")
    },
    KindInfo {
        inputs: &[("u", LATE)],
        params: &[("t", true)],
        states: 1,
        state_output: true,
        ..info("lag")
    },
    KindInfo {
        inputs: &[("u", NOW)],
        params: &[("t_lead", true), ("t_lag", true)],
        states: 1,
        ..info("lead-lag")
    },
    KindInfo {
        inputs: &[("u", NOW_NOT_INIT)],
        params: &[("t", true)],
        states: 1,
        ..info("washout")
    },
    KindInfo {
        inputs: &[
            ("u", STATE_ONLY),
            ("init", OPTIONAL_INIT),
            ("freeze", OPTIONAL_LATE),
        ],
        params: &[("k", true)],
        states: 1,
        state_output: true,
        ..info("integrator")
    },
    KindInfo {
        inputs: &[
            ("u", NOW_NOT_INIT),
            ("init", OPTIONAL_INIT),
            ("freeze", OPTIONAL_LATE),
        ],
        params: &[("kp", true), ("ki", true)],
        states: 1,
        ..info("pi")
    },
    KindInfo {
        inputs: &[("u", NOW_NOT_INIT), ("init", OPTIONAL_INIT)],
        params: &[("kp", true)],
        memories: 1,
        ..info("proportional")
    },
    KindInfo {
        inputs: &[("u", NOW)],
        params: &[("min", true), ("max", true)],
        ..info("limiter")
    },
    KindInfo {
        inputs: &[("u", NOW), ("min", NOW), ("max", NOW)],
        ..info("variable-limiter")
    },
    KindInfo {
        inputs: &[("u", NOW)],
        params: &[("rise", false), ("fall", false)],
        memories: 1,
        ..info("rate-limiter")
    },
    KindInfo {
        inputs: &[("u", NOW)],
        params: &[("width", true)],
        ..info("dead-band")
    },
    KindInfo {
        inputs: &[("u", NOW)],
        params: &[("threshold", true), ("hysteresis", true)],
        options: &["active"],
        memories: 1,
        ..info("detector")
    },
    KindInfo {
        inputs: &[("condition", NOW), ("when_true", NOW), ("when_false", NOW)],
        ..info("select")
    },
    KindInfo {
        inputs: &[("re", LATE), ("im", LATE), ("freeze", OPTIONAL_LATE)],
        params: &[("kp", true), ("ki", true)],
        outputs: &["angle", "freq"],
        states: 2,
        state_output: true,
        ..info("pll")
    },
    KindInfo {
        inputs: &[("re", NOW), ("im", NOW), ("angle", NOW)],
        outputs: &["d", "q"],
        ..info("to-dq")
    },
    KindInfo {
        inputs: &[("d", NOW), ("q", NOW), ("angle", NOW)],
        outputs: &["re", "im"],
        ..info("from-dq")
    },
    KindInfo {
        inputs: &[("re", NOW), ("im", NOW)],
        ..info("magnitude")
    },
    KindInfo {
        inputs: &[("v_re", NOW), ("v_im", NOW), ("i_re", NOW), ("i_im", NOW)],
        outputs: &["p", "q"],
        ..info("power")
    },
    KindInfo {
        inputs: &[("p", NOW), ("q", NOW), ("reactive_priority", OPTIONAL_NOW)],
        params: &[("i_max", true)],
        outputs: &["p", "q", "p_limited"],
        options: &["priority"],
        ..info("current-limit")
    },
    KindInfo {
        inputs: &[("u", LATE)],
        memories: 1,
        state_output: true,
        ..info("delay")
    },
    KindInfo {
        inputs: &[("u", LATE)],
        memories: 1,
        state_output: true,
        ..info("hold")
    },
];

pub fn lookup(kind: &str) -> Option<&'static KindInfo> {
    KINDS.iter().find(|k| k.kind == kind)
}

pub fn known_kinds() -> String {
    KINDS.iter().map(|k| k.kind).collect::<Vec<_>>().join(", ")
}

pub(crate) fn continuous_states(kind: &str) -> usize {
    lookup(kind).map_or(0, |k| k.states)
}
