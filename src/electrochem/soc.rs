//! State-of-charge models: the map between SOC and open-circuit voltage.
//!
//! Two families, both monotone so that the inverse (SOC from a measured
//! voltage) is unique:
//!
//! * [`NernstModel`]: species activities as functions of SOC, combined into
//!   ln Q(SOC) = Σ ν ln a, and E(SOC, T) = E°(T) − (RT/nF) ln Q(SOC).
//! * [`OcvTable`]: a measured (SOC, OCV) curve at a reference temperature,
//!   with an optional entropic coefficient per point, interpolated by a
//!   monotone cubic (Fritsch–Carlson PCHIP) or linearly.
//!
//! Inverses: a Nernst model is inverted in ln Q space (E is linear in
//! ln Q) by safeguarded Newton from a start that depends on the model
//! alone, a few evaluations per reading; a table by a bracketing
//! root-finder (Illinois regula falsi), which on a monotone function always
//! converges, needs no derivative and cannot leave the bracket. The
//! bracketing solver is also the reference the Newton inverse is tested
//! against.
// Item docs here are still being written (DEVELOPERS.md, "Documentation").
#![allow(missing_docs)]

use super::error::ChemistryError;
use super::thermo;
use serde::Serialize;

/// How a species' activity depends on SOC.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Activity {
    /// Constant: 1 for a pure solid or liquid, a set value for a buffered
    /// ion, the partial pressure in bar for a gas.
    Fixed { activity: f64 },
    /// a = per_soc · SOC + at_zero_soc, relative to 1 mol/L (ideal solution).
    Linear { per_soc: f64, at_zero_soc: f64 },
}

impl Activity {
    pub fn at(&self, soc: f64) -> f64 {
        match *self {
            Activity::Fixed { activity } => activity,
            Activity::Linear {
                per_soc,
                at_zero_soc,
            } => per_soc * soc + at_zero_soc,
        }
    }
}

/// One species in the reaction quotient.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Species {
    pub name: String,
    /// Stoichiometric exponent: products positive, reactants negative.
    pub nu: f64,
    pub activity: Activity,
}

/// SOC through the Nernst equation and species activities.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct NernstModel {
    pub species: Vec<Species>,
    /// What the inverse needs of the model alone (see [`NernstModel::new`]).
    #[serde(skip)]
    inverse: InverseStart,
}

/// The parts of the inverse that depend on the model only, not on E° or
/// the temperature: ln Q at both ends (the clamps) and ln Q and its slope
/// at SOC ½ (the starting guess). Computed once per model, so a reading
/// costs a start and two or three Newton steps.
#[derive(Debug, Clone, PartialEq, Default)]
struct InverseStart {
    /// Every exponent a small integer: ln Q is taken as the log of one
    /// product (one `ln` per evaluation instead of one per species).
    whole_powers: bool,
    ln_q_at_0: f64,
    ln_q_at_1: f64,
    ln_q_at_half: f64,
    slope_at_half: f64,
    /// SOC against ln Q on an even grid, for a start close enough that
    /// the first Newton step is the last (empty: start from the logit).
    table: Option<InverseTable>,
}

/// SOC(ln Q) and its slope at evenly spaced ln Q from the model's
/// SOC-1 end to its SOC-0 end: a cubic Hermite interpolant between two
/// nodes is within 2.4e-12 of the inverse for every built-in model, so a
/// reading costs no `ln` or `exp` at all (the logit start's Newton took
/// three evaluations of ln Q and an `exp`); a model whose table is not
/// that close starts Newton from it and needs one step.
#[derive(Debug, Clone, PartialEq)]
struct InverseTable {
    first_ln_q: f64,
    nodes_per_ln_q: f64,
    /// (SOC, dSOC/d(ln Q) times the node spacing) at each node.
    nodes: Vec<(f64, f64)>,
    /// Checked between every two nodes against the inverse when the table
    /// was built and found within [`TRUSTED_TABLE_ERROR`]: its value is
    /// the answer, with no evaluation of ln Q at all.
    trusted: bool,
}

/// How close the interpolant must come to the inverse, at the quarter,
/// half and three-quarter points of every interval, to be the answer
/// itself (a cubic Hermite's error peaks mid-interval).
const TRUSTED_TABLE_ERROR: f64 = 1e-11;

/// Intervals of the inverse table (16 KiB of nodes per model).
const INVERSE_TABLE_INTERVALS: usize = 1024;

impl InverseTable {
    /// The table of `model`, or `None` when its ends are not finite or
    /// out of order (such a model fails validation anyway).
    fn of(model: &NernstModel) -> Option<InverseTable> {
        let (lo, hi) = (model.inverse.ln_q_at_1, model.inverse.ln_q_at_0);
        if !(lo.is_finite() && hi.is_finite() && hi > lo) {
            return None;
        }
        let spacing = (hi - lo) / INVERSE_TABLE_INTERVALS as f64;
        let nodes = (0..=INVERSE_TABLE_INTERVALS)
            .map(|i| {
                let ln_q = if i == INVERSE_TABLE_INTERVALS {
                    hi
                } else {
                    lo + spacing * i as f64
                };
                let soc = model.newton_from(ln_q, model.logit_start(ln_q)).soc;
                let (_, slope) = model.ln_q_and_slope(soc);
                let per_node = if slope.is_finite() && slope != 0.0 {
                    spacing / slope
                } else {
                    0.0
                };
                (soc, per_node)
            })
            .collect();
        let mut table = InverseTable {
            first_ln_q: lo,
            nodes_per_ln_q: 1.0 / spacing,
            nodes,
            trusted: false,
        };
        table.trusted = table.worst_error(model, spacing) <= TRUSTED_TABLE_ERROR;
        Some(table)
    }

    /// The interpolant's largest distance from the inverse at three
    /// points inside every interval.
    fn worst_error(&self, model: &NernstModel, spacing: f64) -> f64 {
        let mut worst = 0.0f64;
        for i in 0..INVERSE_TABLE_INTERVALS {
            for part in [0.25, 0.5, 0.75] {
                let ln_q = self.first_ln_q + spacing * (i as f64 + part);
                let exact = model.newton_from(ln_q, model.logit_start(ln_q)).soc;
                let error = (self.soc_at(ln_q) - exact).abs();
                // NaN (a broken model) must not pass as small.
                worst = if error.is_nan() {
                    f64::INFINITY
                } else {
                    worst.max(error)
                };
            }
        }
        worst
    }

    /// SOC at `ln_q` (inside the table's span) by cubic Hermite interpolation.
    fn soc_at(&self, ln_q: f64) -> f64 {
        let x = (ln_q - self.first_ln_q) * self.nodes_per_ln_q;
        let i = (x as usize).min(self.nodes.len() - 2);
        let t = x - i as f64;
        let ((y0, m0), (y1, m1)) = (self.nodes[i], self.nodes[i + 1]);
        let (t2, t3) = (t * t, t * t * t);
        (2.0 * t3 - 3.0 * t2 + 1.0) * y0
            + (t3 - 2.0 * t2 + t) * m0
            + (-2.0 * t3 + 3.0 * t2) * y1
            + (t3 - t2) * m1
    }
}

/// A Newton step this small ends the SOC inverse (see `soc_at_ln_q`).
const NEWTON_DONE_STEP: f64 = 1e-9;

/// The largest |ν| ln Q is taken as the log of a product for.
const MAX_WHOLE_POWER: f64 = 8.0;

/// How many points of [0, 1] are checked when a model is validated.
const VALIDATION_GRID_POINTS: usize = 201;

impl NernstModel {
    /// A model of these species, with what its inverse needs computed.
    pub fn new(species: Vec<Species>) -> NernstModel {
        let whole_powers = species
            .iter()
            .all(|s| s.nu.fract() == 0.0 && s.nu.abs() <= MAX_WHOLE_POWER);
        let mut model = NernstModel {
            species,
            inverse: InverseStart {
                whole_powers,
                ..InverseStart::default()
            },
        };
        let (ln_q_at_half, slope_at_half) = model.ln_q_and_slope(0.5);
        model.inverse = InverseStart {
            whole_powers,
            ln_q_at_0: model.ln_q(0.0),
            ln_q_at_1: model.ln_q(1.0),
            ln_q_at_half,
            slope_at_half,
            table: None,
        };
        model.inverse.table = InverseTable::of(&model);
        model
    }

    /// ln Q at `soc` (activities must be positive: checked by [`validate`]).
    pub fn ln_q(&self, soc: f64) -> f64 {
        if self.inverse.whole_powers {
            // One `ln` of a product (the estimator's OCV from a counted
            // SOC asks this under current, reading after reading).
            return self.ln_q_and_slope(soc).0;
        }
        self.species
            .iter()
            .map(|s| s.nu * s.activity.at(soc).ln())
            .sum()
    }

    /// ln Q at `soc` and d(ln Q)/d(SOC) there, in one pass over the species.
    fn ln_q_and_slope(&self, soc: f64) -> (f64, f64) {
        if self.inverse.whole_powers {
            let (mut q, mut slope) = (1.0f64, 0.0);
            for s in &self.species {
                let a = s.activity.at(soc);
                // |ν| is at most MAX_WHOLE_POWER: a few multiplications
                // (powi is a library call that costs more than the log).
                let mut power = a;
                for _ in 1..(s.nu.abs() as u32) {
                    power *= a;
                }
                if s.nu > 0.0 {
                    q *= power;
                } else {
                    q /= power;
                }
                if let Activity::Linear { per_soc, .. } = s.activity {
                    slope += s.nu * per_soc / a;
                }
            }
            // A product that left the normal range (activities far from
            // 1 to high powers) is summed as logs instead.
            if q.is_normal() {
                return (q.ln(), slope);
            }
        }
        self.species.iter().fold((0.0, 0.0), |(ln_q, slope), s| {
            let a = s.activity.at(soc);
            let da = match s.activity {
                Activity::Fixed { .. } => 0.0,
                Activity::Linear { per_soc, .. } => per_soc,
            };
            (ln_q + s.nu * a.ln(), slope + s.nu * da / a)
        })
    }

    /// The SOC at which the model's ln Q equals `ln_q`; the nearer end of
    /// [0, 1], flagged, when no SOC reaches it. Safeguarded Newton: ln Q
    /// falls strictly with SOC, so a bracket is kept and a step that would
    /// leave it bisects instead. The start comes from the model's inverse
    /// table, which is the answer itself when it was found within 1e-11
    /// of the inverse everywhere (the built-in models: 2e-12); for a model
    /// without one the start treats ln Q as linear in logit(SOC) through
    /// SOC ½, which a model of species linear in SOC is close to (two or
    /// three steps).
    pub fn soc_at_ln_q(&self, ln_q: f64) -> SocEstimate {
        let st = &self.inverse;
        if ln_q >= st.ln_q_at_0 {
            return SocEstimate {
                soc: 0.0,
                clamped: ln_q > st.ln_q_at_0,
            };
        }
        if ln_q <= st.ln_q_at_1 {
            return SocEstimate {
                soc: 1.0,
                clamped: ln_q < st.ln_q_at_1,
            };
        }
        let start = match &st.table {
            Some(table) if table.trusted => {
                return SocEstimate {
                    soc: table.soc_at(ln_q).clamp(0.0, 1.0),
                    clamped: false,
                };
            }
            Some(table) => table.soc_at(ln_q),
            None => self.logit_start(ln_q),
        };
        self.newton_from(ln_q, start)
    }

    /// A start that treats ln Q as linear in logit(SOC) through SOC ½:
    /// ln Q ≈ ln Q(½) + slope(½)/4 · logit(SOC), since d logit/dSOC = 4 at ½.
    fn logit_start(&self, ln_q: f64) -> f64 {
        let st = &self.inverse;
        let logit = 4.0 * (ln_q - st.ln_q_at_half) / st.slope_at_half;
        1.0 / (1.0 + (-logit).exp())
    }

    /// Safeguarded Newton for the SOC at `ln_q` (strictly inside the
    /// model's span) from `start`.
    fn newton_from(&self, ln_q: f64, start: f64) -> SocEstimate {
        let (mut lo, mut hi) = (0.0, 1.0);
        let mut soc = start.clamp(1e-12, 1.0 - 1e-12);
        for _ in 0..100 {
            let (at, slope) = self.ln_q_and_slope(soc);
            let excess = at - ln_q;
            if excess > 0.0 {
                lo = soc;
            } else if excess < 0.0 {
                hi = soc;
            } else {
                break;
            }
            let mut next = soc - excess / slope;
            let newton = next > lo && next < hi;
            if !newton {
                next = 0.5 * (lo + hi);
            }
            let moved = (next - soc).abs();
            soc = next;
            // Newton converges quadratically: after a step of 1e-9 the
            // error is of order 1e-18 (times the curvature), so one more
            // evaluation would only confirm it. A bisection step says
            // nothing of the kind and goes on to a bracket of 1e-15.
            if (newton && moved <= NEWTON_DONE_STEP) || moved <= 1e-15 || hi - lo <= 1e-15 {
                break;
            }
        }
        SocEstimate {
            soc,
            clamped: false,
        }
    }

    /// Rejects models whose activities are not positive on [0, 1] or whose
    /// ln Q does not fall strictly as SOC rises (E must rise with SOC).
    pub fn validate(&self) -> Result<(), ChemistryError> {
        if self.species.is_empty() {
            return Err(ChemistryError::invalid(
                "soc_model.species",
                "[]",
                "at least one species is needed",
            ));
        }
        for (i, s) in self.species.iter().enumerate() {
            let field = format!("soc_model.species[{i}]");
            if !s.nu.is_finite() || s.nu == 0.0 {
                return Err(ChemistryError::invalid(
                    format!("{field}.nu"),
                    s.nu,
                    "must be finite and non-zero",
                ));
            }
            for k in 0..VALIDATION_GRID_POINTS {
                let soc = k as f64 / (VALIDATION_GRID_POINTS - 1) as f64;
                let a = s.activity.at(soc);
                if !(a.is_finite() && a > 0.0) {
                    return Err(ChemistryError::invalid(
                        format!("{field}.activity"),
                        a,
                        format!(
                            "activity of {} must be positive for every SOC in [0, 1]; it is {a} at SOC {soc}",
                            s.name
                        ),
                    ));
                }
            }
        }
        let mut previous = self.ln_q(0.0);
        for k in 1..VALIDATION_GRID_POINTS {
            let soc = k as f64 / (VALIDATION_GRID_POINTS - 1) as f64;
            let now = self.ln_q(soc);
            if now >= previous {
                return Err(ChemistryError::invalid(
                    "soc_model.species",
                    format!("ln Q({soc}) = {now}"),
                    "ln Q must fall strictly as SOC rises (charged species are reactants of the discharge reaction)",
                ));
            }
            previous = now;
        }
        Ok(())
    }
}

/// Interpolation between table points.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, serde::Deserialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum Interpolation {
    /// Monotone piecewise cubic Hermite (Fritsch & Carlson, SIAM J. Numer.
    /// Anal. 17, 1980): smooth and never overshoots between points.
    #[default]
    Pchip,
    Linear,
}

/// A measured OCV–SOC curve.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct OcvTable {
    pub reference_temp_k: f64,
    pub interpolation: Interpolation,
    pub soc: Vec<f64>,
    pub ocv_volts: Vec<f64>,
    /// dOCV/dT per point, V/K (zeros when not measured).
    pub entropic_volts_per_k: Vec<f64>,
}

/// Temperature range over which a table must stay monotone: a rig outside
/// it is outside any plausible OCV measurement anyway.
pub const TABLE_CHECK_TEMPS_K: [f64; 2] = [233.15, 373.15];

impl OcvTable {
    pub fn validate(&self) -> Result<(), ChemistryError> {
        let n = self.soc.len();
        if n < 2 {
            return Err(ChemistryError::invalid(
                "soc_model.points",
                n,
                "a table needs at least two points",
            ));
        }
        if self.ocv_volts.len() != n || self.entropic_volts_per_k.len() != n {
            return Err(ChemistryError::invalid(
                "soc_model.entropic_mv_per_k",
                self.entropic_volts_per_k.len(),
                format!("needs one value per point ({n})"),
            ));
        }
        if !(self.reference_temp_k.is_finite() && self.reference_temp_k > 0.0) {
            return Err(ChemistryError::invalid(
                "soc_model.reference_temp_c",
                self.reference_temp_k - 273.15,
                "must be above absolute zero",
            ));
        }
        for i in 0..n {
            for (name, value) in [
                ("soc", self.soc[i]),
                ("ocv", self.ocv_volts[i]),
                ("entropic", self.entropic_volts_per_k[i]),
            ] {
                if !value.is_finite() {
                    return Err(ChemistryError::invalid(
                        format!("soc_model.points[{i}].{name}"),
                        value,
                        "must be finite",
                    ));
                }
            }
            if !(0.0..=1.0).contains(&self.soc[i]) {
                return Err(ChemistryError::invalid(
                    format!("soc_model.points[{i}].soc"),
                    self.soc[i],
                    "must lie in [0, 1]",
                ));
            }
        }
        for i in 1..n {
            if self.soc[i] <= self.soc[i - 1] {
                return Err(ChemistryError::invalid(
                    "soc_model.points",
                    format!(
                        "points {} and {i}: soc {} then {}",
                        i - 1,
                        self.soc[i - 1],
                        self.soc[i]
                    ),
                    "SOC must increase strictly",
                ));
            }
        }
        for temp_k in std::iter::once(self.reference_temp_k).chain(TABLE_CHECK_TEMPS_K) {
            let knots = self.knots_at(temp_k);
            for i in 1..n {
                if knots[i] <= knots[i - 1] {
                    return Err(ChemistryError::invalid(
                        "soc_model.points",
                        format!(
                            "points {} and {i}: ocv {:.6} V then {:.6} V at {:.2} K",
                            i - 1,
                            knots[i - 1],
                            knots[i],
                            temp_k
                        ),
                        "OCV must increase strictly with SOC (a non-monotone table has no unique inverse)",
                    ));
                }
            }
        }
        Ok(())
    }

    fn knots_at(&self, temp_k: f64) -> Vec<f64> {
        let dt = temp_k - self.reference_temp_k;
        self.ocv_volts
            .iter()
            .zip(&self.entropic_volts_per_k)
            .map(|(ocv, ds)| ocv + ds * dt)
            .collect()
    }

    /// OCV at `soc` (clamped to the table's SOC span) and `temp_k`.
    pub fn ocv_volts(&self, soc: f64, temp_k: f64) -> f64 {
        let ys = self.knots_at(temp_k);
        let xs = &self.soc;
        let soc = soc.clamp(xs[0], xs[xs.len() - 1]);
        let i = match xs.partition_point(|&x| x <= soc) {
            0 => 0,
            p if p >= xs.len() => xs.len() - 2,
            p => p - 1,
        };
        let h = xs[i + 1] - xs[i];
        let t = (soc - xs[i]) / h;
        match self.interpolation {
            Interpolation::Linear => ys[i] + t * (ys[i + 1] - ys[i]),
            Interpolation::Pchip => {
                let (d0, d1) = (pchip_slope(xs, &ys, i), pchip_slope(xs, &ys, i + 1));
                let (t2, t3) = (t * t, t * t * t);
                let h00 = 2.0 * t3 - 3.0 * t2 + 1.0;
                let h10 = t3 - 2.0 * t2 + t;
                let h01 = -2.0 * t3 + 3.0 * t2;
                let h11 = t3 - t2;
                h00 * ys[i] + h10 * h * d0 + h01 * ys[i + 1] + h11 * h * d1
            }
        }
    }

    pub fn soc_span(&self) -> (f64, f64) {
        (self.soc[0], self.soc[self.soc.len() - 1])
    }
}

/// Fritsch–Carlson derivative at knot `k`, in the form used by SciPy's
/// `PchipInterpolator` (weighted harmonic mean of neighbouring secants,
/// zero at a local extremum; one-sided three-point formula at the ends).
fn pchip_slope(xs: &[f64], ys: &[f64], k: usize) -> f64 {
    let n = xs.len();
    let secant = |j: usize| (ys[j + 1] - ys[j]) / (xs[j + 1] - xs[j]);
    if n == 2 {
        return secant(0);
    }
    let end_slope = |h0: f64, h1: f64, m0: f64, m1: f64| {
        let d = ((2.0 * h0 + h1) * m0 - h0 * m1) / (h0 + h1);
        if d.signum() != m0.signum() {
            0.0
        } else if m0.signum() != m1.signum() && d.abs() > 3.0 * m0.abs() {
            3.0 * m0
        } else {
            d
        }
    };
    if k == 0 {
        return end_slope(xs[1] - xs[0], xs[2] - xs[1], secant(0), secant(1));
    }
    if k == n - 1 {
        return end_slope(
            xs[n - 1] - xs[n - 2],
            xs[n - 2] - xs[n - 3],
            secant(n - 2),
            secant(n - 3),
        );
    }
    let (m0, m1) = (secant(k - 1), secant(k));
    if m0 * m1 <= 0.0 {
        return 0.0;
    }
    let (h0, h1) = (xs[k] - xs[k - 1], xs[k + 1] - xs[k]);
    let (w1, w2) = (2.0 * h1 + h0, h1 + 2.0 * h0);
    (w1 + w2) / (w1 / m0 + w2 / m1)
}

/// The model a chemistry uses for SOC.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum SocModel {
    Nernst(NernstModel),
    OcvTable(OcvTable),
    /// Thermodynamic state only (fuel cells, electrolysers, teaching cells).
    None,
}

impl SocModel {
    pub fn name(&self) -> &'static str {
        match self {
            SocModel::Nernst(_) => "nernst",
            SocModel::OcvTable(_) => "ocv_table",
            SocModel::None => "none",
        }
    }
}

/// Inputs shared by the forward and inverse maps of a Nernst model.
#[derive(Debug, Clone, Copy)]
pub struct NernstContext {
    pub n_electrons: u32,
    pub e_standard_volts: f64,
    pub temp_k: f64,
}

/// SOC from a voltage, with a flag when the voltage was out of reach.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SocEstimate {
    pub soc: f64,
    /// The voltage lay outside [E(SOC_min), E(SOC_max)]; `soc` is the bound.
    pub clamped: bool,
}

impl SocModel {
    /// Open-circuit voltage of one cell at `soc`. `None` for a model without SOC.
    pub fn ocv_volts(&self, soc: f64, ctx: NernstContext) -> Option<f64> {
        match self {
            SocModel::Nernst(m) => Some(thermo::nernst_volts(
                ctx.n_electrons,
                ctx.e_standard_volts,
                m.ln_q(soc.clamp(0.0, 1.0)),
                ctx.temp_k,
            )),
            SocModel::OcvTable(t) => Some(t.ocv_volts(soc, ctx.temp_k)),
            SocModel::None => None,
        }
    }

    fn soc_span(&self) -> (f64, f64) {
        match self {
            SocModel::OcvTable(t) => t.soc_span(),
            _ => (0.0, 1.0),
        }
    }

    /// SOC at which one cell shows `cell_volts` at open circuit. `None` for a
    /// model without SOC. Never NaN for finite input.
    pub fn soc_from_volts(&self, cell_volts: f64, ctx: NernstContext) -> Option<SocEstimate> {
        match self {
            SocModel::None => None,
            // E = E° − ln Q / (nF/RT), so the inverse is one multiplication
            // away from ln Q's, which needs no voltage evaluations at all.
            SocModel::Nernst(m) => Some(m.soc_at_ln_q(
                (ctx.e_standard_volts - cell_volts)
                    * thermo::nf_over_rt(ctx.n_electrons, ctx.temp_k),
            )),
            SocModel::OcvTable(_) => Some(self.soc_bracketed(cell_volts, ctx)),
        }
    }

    /// The inverse by a bracketing root-finder on the forward map (tables,
    /// and the reference the Nernst inverse is tested against).
    fn soc_bracketed(&self, cell_volts: f64, ctx: NernstContext) -> SocEstimate {
        let (lo_soc, hi_soc) = self.soc_span();
        let f = |soc: f64| self.ocv_volts(soc, ctx).unwrap_or(f64::NAN);
        let (lo_v, hi_v) = (f(lo_soc), f(hi_soc));
        if cell_volts <= lo_v {
            return SocEstimate {
                soc: lo_soc,
                clamped: cell_volts < lo_v,
            };
        }
        if cell_volts >= hi_v {
            return SocEstimate {
                soc: hi_soc,
                clamped: cell_volts > hi_v,
            };
        }
        // Illinois variant of regula falsi: keeps the bracket like bisection
        // but converges superlinearly (about ten evaluations instead of
        // fifty), which matters on the ingest path.
        let (mut lo, mut hi) = (lo_soc, hi_soc);
        let (mut f_lo, mut f_hi) = (lo_v - cell_volts, hi_v - cell_volts);
        let mut side = 0i8;
        for _ in 0..200 {
            if hi - lo < 1e-13 {
                break;
            }
            let mut x = (lo * f_hi - hi * f_lo) / (f_hi - f_lo);
            if !(x > lo && x < hi) {
                x = 0.5 * (lo + hi);
            }
            let fx = f(x) - cell_volts;
            if fx == 0.0 {
                return SocEstimate {
                    soc: x,
                    clamped: false,
                };
            }
            if fx < 0.0 {
                lo = x;
                f_lo = fx;
                if side == -1 {
                    f_hi *= 0.5;
                }
                side = -1;
            } else {
                hi = x;
                f_hi = fx;
                if side == 1 {
                    f_lo *= 0.5;
                }
                side = 1;
            }
        }
        SocEstimate {
            soc: 0.5 * (lo + hi),
            clamped: false,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn table(points: &[(f64, f64)], interpolation: Interpolation) -> OcvTable {
        OcvTable {
            reference_temp_k: 298.15,
            interpolation,
            soc: points.iter().map(|p| p.0).collect(),
            ocv_volts: points.iter().map(|p| p.1).collect(),
            entropic_volts_per_k: vec![0.0; points.len()],
        }
    }

    #[test]
    fn pchip_hits_knots_and_does_not_overshoot() {
        let t = table(
            &[(0.0, 1.0), (0.5, 2.0), (0.6, 2.01), (1.0, 3.0)],
            Interpolation::Pchip,
        );
        t.validate().unwrap();
        for (s, v) in [(0.0, 1.0), (0.5, 2.0), (0.6, 2.01), (1.0, 3.0)] {
            assert!((t.ocv_volts(s, 298.15) - v).abs() < 1e-12);
        }
        // Monotone between knots (the property PCHIP exists for).
        let mut prev = f64::MIN;
        for k in 0..=1000 {
            let v = t.ocv_volts(k as f64 / 1000.0, 298.15);
            assert!(v >= prev);
            prev = v;
        }
    }

    #[test]
    fn pchip_matches_scipy() {
        // Check values from SciPy 1.17.1, scipy.interpolate.PchipInterpolator
        // on x = [0, 1/3, 2/3, 1], y = [0, 1, 1.5, 3] (run here, from PyPI):
        // p(0.5) = 1.2395833333333333, p(0.1) = 0.35775, p(0.9) = 2.42925.
        let t = OcvTable {
            reference_temp_k: 298.15,
            interpolation: Interpolation::Pchip,
            soc: vec![0.0, 1.0 / 3.0, 2.0 / 3.0, 1.0],
            ocv_volts: vec![0.0, 1.0, 1.5, 3.0],
            entropic_volts_per_k: vec![0.0; 4],
        };
        for (soc, scipy) in [(0.5, 1.2395833333333333), (0.1, 0.35775), (0.9, 2.42925)] {
            let ours = t.ocv_volts(soc, 298.15);
            assert!((ours - scipy).abs() < 1e-12, "soc {soc}: {ours} vs {scipy}");
        }
    }

    #[test]
    fn non_monotone_table_names_the_points() {
        let t = table(
            &[(0.0, 1.0), (0.5, 2.0), (0.7, 1.9), (1.0, 3.0)],
            Interpolation::Linear,
        );
        let err = t.validate().unwrap_err().to_string();
        assert!(err.contains("points 1 and 2"), "{err}");
    }

    #[test]
    fn table_needs_two_points() {
        let t = table(&[(0.5, 2.0)], Interpolation::Linear);
        assert!(t.validate().is_err());
    }

    #[test]
    fn inverse_clamps_and_flags() {
        let model = SocModel::OcvTable(table(&[(0.0, 1.0), (1.0, 2.0)], Interpolation::Linear));
        let ctx = NernstContext {
            n_electrons: 1,
            e_standard_volts: 1.5,
            temp_k: 298.15,
        };
        assert_eq!(
            model.soc_from_volts(0.5, ctx),
            Some(SocEstimate {
                soc: 0.0,
                clamped: true
            })
        );
        assert_eq!(
            model.soc_from_volts(2.5, ctx),
            Some(SocEstimate {
                soc: 1.0,
                clamped: true
            })
        );
        let mid = model.soc_from_volts(1.25, ctx).unwrap();
        assert!(!mid.clamped && (mid.soc - 0.25).abs() < 1e-12);
    }

    #[test]
    fn nernst_model_rejects_nonpositive_activity() {
        let m = NernstModel::new(vec![Species {
            name: "X".into(),
            nu: -1.0,
            activity: Activity::Linear {
                per_soc: 1.0,
                at_zero_soc: 0.0,
            },
        }]);
        let err = m.validate().unwrap_err().to_string();
        assert!(err.contains("activity"), "{err}");
    }

    #[test]
    fn nernst_model_rejects_wrong_direction() {
        // A reactant whose activity falls with SOC makes E fall with SOC.
        let m = NernstModel::new(vec![Species {
            name: "X".into(),
            nu: -1.0,
            activity: Activity::Linear {
                per_soc: -0.5,
                at_zero_soc: 1.0,
            },
        }]);
        assert!(m.validate().is_err());
    }

    #[test]
    fn a_steep_model_agrees_with_the_bracketing_inverse_whether_its_table_is_trusted_or_not() {
        // Activities from 1e-9 at one end: ln Q spans about 80, most of
        // SOC's change packed at the ends.
        let steep = |name: &str, nu: f64, per_soc: f64, at_zero_soc: f64| Species {
            name: name.into(),
            nu,
            activity: Activity::Linear {
                per_soc,
                at_zero_soc,
            },
        };
        let model = SocModel::Nernst(NernstModel::new(vec![
            steep("ox", -3.0, 1.0, 1e-9),
            steep("red", 2.0, -1.0, 1.0 + 1e-9),
        ]));
        let ctx = NernstContext {
            n_electrons: 2,
            e_standard_volts: 0.5,
            temp_k: 310.0,
        };
        let (lo, hi) = (
            model.ocv_volts(0.0, ctx).unwrap(),
            model.ocv_volts(1.0, ctx).unwrap(),
        );
        for k in 0..=2000 {
            let volts = lo + (hi - lo) * k as f64 / 2000.0;
            let got = model.soc_from_volts(volts, ctx).unwrap();
            let reference = model.soc_bracketed(volts, ctx);
            assert!(
                (got.soc - reference.soc).abs() < 1e-9,
                "{volts} V: {} vs {}",
                got.soc,
                reference.soc
            );
        }
    }

    #[test]
    fn newton_in_ln_q_agrees_with_the_bracketing_inverse() {
        use proptest::prelude::*;
        let registry = crate::electrochem::Registry::builtin();
        let models: Vec<_> = registry
            .iter()
            .filter(|c| matches!(c.soc_model, SocModel::Nernst(_)))
            .cloned()
            .collect();
        assert!(models.len() >= 4);
        let config = ProptestConfig {
            cases: 2000,
            failure_persistence: None,
            ..ProptestConfig::default()
        };
        proptest!(config, |(pick in 0usize..100, at in -0.05f64..1.05, temp_k in 253.15f64..363.15)| {
            let c = &models[pick % models.len()];
            let ctx = NernstContext {
                n_electrons: c.n_electrons,
                e_standard_volts: c.standard_potential().at(temp_k),
                temp_k,
            };
            // Voltages from below the model's range to above it.
            let lo = c.soc_model.ocv_volts(0.0, ctx).unwrap();
            let hi = c.soc_model.ocv_volts(1.0, ctx).unwrap();
            let volts = lo + at * (hi - lo);
            let newton = c.soc_model.soc_from_volts(volts, ctx).unwrap();
            let reference = c.soc_model.soc_bracketed(volts, ctx);
            // The table's start against the logit start it replaced, and
            // Newton from an untrusted table against the reference.
            if let SocModel::Nernst(m) = &c.soc_model {
                prop_assert!(m.inverse.table.as_ref().is_some_and(|t| t.trusted), "{}", c.id);
                let mut polished = m.clone();
                if let Some(t) = polished.inverse.table.as_mut() {
                    t.trusted = false;
                }
                let ctx_ln_q = (ctx.e_standard_volts - volts) * thermo::nf_over_rt(ctx.n_electrons, temp_k);
                let from_table = polished.soc_at_ln_q(ctx_ln_q);
                prop_assert!((from_table.soc - reference.soc).abs() < 1e-9,
                    "{}: {volts} V: Newton from the table {} vs {}", c.id, from_table.soc, reference.soc);
                let ln_q = (ctx.e_standard_volts - volts) * thermo::nf_over_rt(ctx.n_electrons, temp_k);
                if ln_q < m.inverse.ln_q_at_0 && ln_q > m.inverse.ln_q_at_1 {
                    let logit = m.newton_from(ln_q, m.logit_start(ln_q));
                    prop_assert!((newton.soc - logit.soc).abs() < 1e-9,
                        "{}: {volts} V at {temp_k} K: table start {} vs logit start {}", c.id, newton.soc, logit.soc);
                }
            }
            prop_assert!((newton.soc - reference.soc).abs() < 1e-9,
                "{}: {volts} V at {temp_k} K: {} vs {}", c.id, newton.soc, reference.soc);
            if !(0.0..=1.0).contains(&at) {
                prop_assert_eq!(newton.clamped, reference.clamped);
            }
        });
    }
}
