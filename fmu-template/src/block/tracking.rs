//! The ideal-tracking limit of a PI: its gains grow without bound at a fixed ratio.
//!
//! Sound for one structural pattern only, which is checked:
//!
//! ```text
//!   e = r − m           (a `sum` of two terms; r does not depend on the PI)
//!   c = PI(e)           (`pi` or `proportional`, the parameter is its kp or ki)
//!   y = chain(c)        (gains and sums only: y = g·c + terms that do not depend on c)
//!   m = lag(y) or m = delay(y)     (exactly one state between the PI and its measurement)
//! ```
//!
//! With kp → ∞ (ki/kp fixed or → 0) the closed loop m/r = kp·g(s + ki/kp)/(s·(1 + sT) + kp·g·(s +
//! ki/kp)) has one pole that runs to −∞ and one that cancels the PI's zero, so m → r exactly: the
//! loop is of relative degree one (textbook high-gain feedback; common practice). Two or more
//! lags in the loop, or a limiter, would not give this limit (the high-gain poles of a relative
//! degree ≥ 2 loop become oscillatory, and a saturated loop cannot track), so they are refused.
//!
//! The rewrite: m is replaced by r everywhere, the lag and the PI disappear (their states and
//! the lag's time constant with them), and the PI's output is what makes the chain deliver y = r:
//! c = chain⁻¹(r). The chain's own blocks stay, so every signal on it keeps its meaning. When r
//! varies in time the exact limit is y = r + T·ṙ, which the engine cannot form; that case is
//! accepted only when nothing outside the loop reads the chain's signals (then only m = r is
//! observable).

use super::template::{BlockSpec, ParamRef, Template};
use super::INPUT_SIGNALS;

/// Why the pattern is not there, with the block and setting at fault.
pub(super) struct Refusal {
    pub block: String,
    pub setting: String,
    pub reason: String,
}

fn refuse(b: &BlockSpec, setting: &str, reason: impl Into<String>) -> Refusal {
    Refusal {
        block: format!("{} ({})", b.name, b.kind),
        setting: setting.into(),
        reason: reason.into(),
    }
}

/// A signed term of a `sum`: (+1 or −1, signal).
fn signed_term(term: &str) -> (f64, &str) {
    match term.chars().next() {
        Some('-') => (-1.0, &term[1..]),
        Some('+') => (1.0, &term[1..]),
        _ => (1.0, term),
    }
}

/// The block whose output is `signal` (`name` or `name.port`).
fn producer<'a>(t: &'a Template, signal: &str) -> Option<&'a BlockSpec> {
    let name = signal.split('.').next().unwrap_or(signal);
    t.blocks.iter().find(|b| b.name == name)
}

/// Signals a block reads (ports and terms, without their marks).
fn reads(b: &BlockSpec) -> Vec<&str> {
    let mut v: Vec<&str> = b.inputs.values().map(String::as_str).collect();
    for term in &b.terms {
        v.push(term.trim_start_matches(['+', '-', '/', '*']));
    }
    v
}

/// Whether `signal` depends on the output of block `target`, not looking through block `cut`.
fn depends_on(t: &Template, signal: &str, target: &str, cut: &str) -> bool {
    let mut seen: Vec<&str> = Vec::new();
    let mut stack = vec![signal];
    while let Some(s) = stack.pop() {
        let Some(b) = producer(t, s) else { continue };
        if b.name == target {
            return true;
        }
        if b.name == cut || seen.contains(&b.name.as_str()) {
            continue;
        }
        seen.push(&b.name);
        stack.extend(reads(b));
    }
    false
}

/// Whether `signal` is the same at every sample (built from setpoints and constants only).
fn time_invariant(t: &Template, signal: &str) -> bool {
    if INPUT_SIGNALS.contains(&signal) {
        return false;
    }
    match producer(t, signal) {
        Some(b) => match b.kind.as_str() {
            "setpoint" | "constant" => true,
            "sum" | "product" | "gain" => reads(b).iter().all(|s| time_invariant(t, s)),
            _ => false,
        },
        None => false,
    }
}

/// Blocks (by name) and template outputs that read `signal`.
fn readers<'a>(t: &'a Template, signal: &str) -> Vec<&'a str> {
    let mut v: Vec<&str> = t
        .blocks
        .iter()
        .filter(|b| reads(b).contains(&signal))
        .map(|b| b.name.as_str())
        .collect();
    let o = &t.outputs;
    for (port, s) in [
        ("output i_re", &o.i_re),
        ("output i_im", &o.i_im),
        ("output p", &o.p),
        ("output q", &o.q),
    ] {
        if s == signal {
            v.push(port);
        }
    }
    v
}

/// Rewrite `template` at the ideal-tracking limit of the PI using `parameter`: the template
/// (not yet compiled) and one sentence of what was done.
pub(super) fn ideal_tracking(
    template: &Template,
    parameter: &str,
) -> Result<(Template, String), Refusal> {
    let users: Vec<(&BlockSpec, &str, bool)> = template
        .blocks
        .iter()
        .flat_map(|b| {
            b.params.iter().filter_map(move |(setting, r)| {
                r.parameter()
                    .filter(|(n, _)| *n == parameter)
                    .map(|(_, negate)| (b, setting.as_str(), negate))
            })
        })
        .collect();
    let Some(&(pi, _, _)) = users.first() else {
        return Err(Refusal {
            block: "(none)".into(),
            setting: String::new(),
            reason: "no block uses the parameter".into(),
        });
    };
    for &(b, setting, negate) in &users {
        if !matches!(b.kind.as_str(), "pi" | "proportional") || !matches!(setting, "kp" | "ki") {
            return Err(refuse(
                b,
                setting,
                "ideal tracking is a limit of a PI's gains; this is not a PI gain",
            ));
        }
        if b.name != pi.name {
            return Err(refuse(
                b,
                setting,
                format!(
                    "the parameter is shared with PI `{}`; each PI closes its own loop",
                    pi.name
                ),
            ));
        }
        if negate {
            return Err(refuse(b, setting, "a negated gain is positive feedback"));
        }
    }

    // e = r − m
    let e_signal = pi.inputs.get("u").cloned().unwrap_or_default();
    let e = producer(template, &e_signal)
        .filter(|b| b.kind == "sum" && b.terms.len() == 2)
        .ok_or_else(|| {
            refuse(
                pi,
                "u",
                format!(
                    "its input `{e_signal}` is not a sum of two terms (reference − measurement)"
                ),
            )
        })?;
    let terms: Vec<(f64, &str)> = e.terms.iter().map(|t| signed_term(t)).collect();
    let loop_side: Vec<bool> = terms
        .iter()
        .map(|(_, s)| depends_on(template, s, &pi.name, ""))
        .collect();
    let (m_index, r_index) = match loop_side.as_slice() {
        [true, false] => (0, 1),
        [false, true] => (1, 0),
        [false, false] => {
            return Err(refuse(
                e,
                "terms",
                format!(
                    "no term depends on the output of PI `{}`: the PI closes no loop",
                    pi.name
                ),
            ))
        }
        _ => {
            return Err(refuse(
                e,
                "terms",
                format!(
                    "both terms depend on the output of PI `{}`: no reference to follow",
                    pi.name
                ),
            ))
        }
    };
    let ((m_sign, m), (r_sign, r)) = (terms[m_index], terms[r_index]);
    if m_sign * r_sign > 0.0 {
        return Err(refuse(
            e,
            "terms",
            "reference and measurement enter with the same sign (not an error signal)",
        ));
    }

    // m = lag(y) or delay(y)
    let lag = producer(template, m)
        .filter(|b| b.name == m && matches!(b.kind.as_str(), "lag" | "delay"))
        .ok_or_else(|| {
            let b = producer(template, m).unwrap_or(e);
            refuse(
                b,
                "",
                format!(
                    "the measured signal `{m}` is not the output of a lag or a one-step delay \
                     (ideal tracking needs exactly one state between PI `{}` and its \
                     measurement)",
                    pi.name
                ),
            )
        })?;

    // y = chain(c): gains and sums from the PI's output to the lag's input
    let mut chain: Vec<&BlockSpec> = Vec::new();
    let mut loop_sign = m_sign;
    let mut s = lag.inputs.get("u").cloned().unwrap_or_default();
    while s != pi.name {
        let c = producer(template, &s)
            .filter(|c| c.name == s || !matches!(c.kind.as_str(), "gain" | "sum"))
            .ok_or_else(|| {
                refuse(
                    lag,
                    "u",
                    format!(
                        "`{s}` between PI `{}` and the lag is not a block's single output",
                        pi.name
                    ),
                )
            })?;
        if chain.len() > template.blocks.len() {
            return Err(refuse(
                c,
                "",
                "the chain from the PI to the lag does not end",
            ));
        }
        match c.kind.as_str() {
            "gain" => {
                match c.params.get("k") {
                    Some(ParamRef::Value(k)) if *k == 0.0 || !k.is_finite() => {
                        return Err(refuse(c, "k", format!("gain {k} cannot be inverted")))
                    }
                    Some(ParamRef::Value(k)) => loop_sign *= k.signum(),
                    Some(r) => {
                        if r.parameter().is_some_and(|(_, negate)| negate) {
                            loop_sign = -loop_sign;
                        }
                    }
                    None => return Err(refuse(c, "k", "no gain")),
                }
                s = c.inputs.get("u").cloned().unwrap_or_default();
            }
            "sum" => {
                let on_path: Vec<(f64, &str)> = c
                    .terms
                    .iter()
                    .map(|t| signed_term(t))
                    .filter(|(_, t)| depends_on(template, t, &pi.name, &lag.name))
                    .collect();
                let [(sign, next)] = on_path.as_slice() else {
                    return Err(refuse(
                        c,
                        "terms",
                        format!(
                            "{} terms depend on the output of PI `{}`; ideal tracking inverts a \
                             sum with exactly one",
                            on_path.len(),
                            pi.name
                        ),
                    ));
                };
                loop_sign *= sign;
                s = next.to_string();
            }
            other => {
                return Err(refuse(
                    c,
                    "",
                    format!(
                        "ideal tracking inverts only gains and sums between PI `{}` and the lag \
                         `{}`; a `{other}` block is in the loop",
                        pi.name, lag.name
                    ),
                ))
            }
        }
        chain.push(c);
    }
    if loop_sign > 0.0 {
        return Err(refuse(
            e,
            "terms",
            format!(
                "the loop through PI `{}` and `{}` is positive feedback: high gains diverge",
                pi.name, lag.name
            ),
        ));
    }

    // signals between the PI and the lag read outside the loop need y = r + T·ṙ unless r is
    // constant
    let inner: Vec<&str> = std::iter::once(pi.name.as_str())
        .chain(chain.iter().map(|c| c.name.as_str()))
        .collect();
    let read_outside = inner.iter().find_map(|&sig| {
        readers(template, sig)
            .into_iter()
            .find(|reader| !inner.contains(reader) && *reader != lag.name)
            .map(|reader| (sig, reader))
    });
    if let Some((sig, reader)) = read_outside {
        if !time_invariant(template, r) {
            return Err(refuse(
                lag,
                "",
                format!(
                    "the reference `{r}` varies in time and `{sig}` (between PI `{}` and the lag) \
                     is read by `{reader}`: following the reference exactly would need its \
                     derivative",
                    pi.name
                ),
            ));
        }
    }

    // c = chain⁻¹(r), walked from the lag's input back to the PI; the last block keeps the PI's
    // name so every reader of the PI's output reads the inverse
    let mut inverse: Vec<BlockSpec> = Vec::new();
    let mut target = r.to_string();
    let name_at = |i: usize| {
        if i + 1 == chain.len() {
            pi.name.clone()
        } else {
            format!("{}__tracking_{i}", pi.name)
        }
    };
    for (i, c) in chain.iter().enumerate() {
        let name = name_at(i);
        if c.kind == "gain" {
            let k_name = format!("{}__tracking_{i}_gain", pi.name);
            inverse.push(BlockSpec::new(&k_name, "constant").param("value", c.params["k"].clone()));
            inverse.push(BlockSpec::new(&name, "product").terms(&[&target, &format!("/{k_name}")]));
        } else {
            // y = s·x + Σ s_j·o_j  ⇒  x = s·y − Σ s·s_j·o_j
            let mut path_sign = 1.0;
            let mut others = Vec::new();
            for (sj, oj) in c.terms.iter().map(|t| signed_term(t)) {
                if depends_on(template, oj, &pi.name, &lag.name) {
                    path_sign = sj;
                } else {
                    others.push((sj, oj));
                }
            }
            let mark = |sign: f64| if sign > 0.0 { "+" } else { "-" };
            let mut terms = vec![format!("{}{target}", mark(path_sign))];
            for (sj, oj) in others {
                terms.push(format!("{}{oj}", mark(-path_sign * sj)));
            }
            let refs: Vec<&str> = terms.iter().map(String::as_str).collect();
            inverse.push(BlockSpec::new(&name, "sum").terms(&refs));
        }
        target = name;
    }
    if chain.is_empty() {
        inverse.push(BlockSpec::new(&pi.name, "sum").terms(&[&format!("+{r}")]));
    }

    let mut reduced = template.clone();
    let pi_name = pi.name.clone();
    let lag_name = lag.name.clone();
    let e_name = e.name.clone();
    let e_read_elsewhere = readers(template, &e_name).iter().any(|x| *x != pi_name);
    let at = reduced
        .blocks
        .iter()
        .position(|b| b.name == pi_name)
        .expect("the PI is in the template");
    reduced.blocks.splice(at..=at, inverse);
    reduced.blocks.retain(|b| b.name != lag_name);
    if !e_read_elsewhere {
        reduced.blocks.retain(|b| b.name != e_name);
    }
    super::limits::rename_signal(&mut reduced, m, r);

    let through = if chain.is_empty() {
        String::new()
    } else {
        format!(
            " through the inverse of {}",
            chain
                .iter()
                .rev()
                .map(|c| format!("{} `{}`", c.kind, c.name))
                .collect::<Vec<_>>()
                .join(", ")
        )
    };
    let effect = format!(
        "PI `{pi_name}` tracks ideally: `{m}` ({} `{lag_name}`) follows its reference `{r}` \
         exactly; the PI and the {} are removed, `{pi_name}` is computed from `{r}`{through}",
        lag.kind, lag.kind
    );
    Ok((reduced, effect))
}
