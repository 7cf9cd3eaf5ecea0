//! A cell's own Nernst model, fitted from its settled rests.
//!
//! Each settled rest is a calibration point: its open-circuit voltage per
//! cell, its temperature and the charge counted since the run began. The
//! SOC of rest i is SOC₀ + (q_i − q₀)/C: the SOC at the first rest is a
//! free parameter, the counted charge between rests is known (and the
//! capacity C known or fitted too). The voltage follows
//!
//! E_i = E°′ + dE°/dT·(T_i − 298.15 K) − (R·T_i / (n_app·F)) · ln Q(SOC_i)
//!
//! with ln Q(SOC) from the chemistry's species activities. E°′ (the formal
//! potential at 298.15 K) and n_app (the apparent electron number) absorb
//! what the ideal model leaves out: activity coefficients, the Donnan
//! potential of the membrane, a junction potential. An operator's anchor
//! (`SetChannelSoc`) is a point of known SOC: SOC₀ then follows from it.
//!
//! Nonlinear least squares by Levenberg–Marquardt (Marquardt's diagonal
//! scaling), with the covariance s²·(JᵀJ)⁻¹ at the solution (s² the
//! residual variance on m − p degrees of freedom). Pure: no I/O, no clock.

use crate::electrochem::constants::{FARADAY_C_PER_MOL, GAS_CONSTANT_J_PER_MOL_K, STANDARD_TEMP_K};
use crate::electrochem::soc::{Activity, NernstModel};

/// One settled rest as a calibration point.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RestPoint {
    pub time_ns: i64,
    /// Open-circuit voltage of one cell at the end of the settled rest.
    pub cell_volts: f64,
    pub temp_k: f64,
    /// Charge counted into the cell since the run began (charge positive).
    pub charge_ah: f64,
}

/// An operator's SOC entry: the SOC the cell had when the count stood at
/// `charge_ah`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SocAnchorPoint {
    pub soc: f64,
    pub charge_ah: f64,
}

/// What is known before the fit.
#[derive(Debug, Clone)]
pub struct FitSetup<'a> {
    pub model: &'a NernstModel,
    /// The chemistry's electron number: the starting n_app.
    pub n_electrons: u32,
    /// The chemistry's E°(298.15 K): the starting E°′.
    pub e_standard_298_volts: f64,
    pub de_dt_volts_per_k: f64,
    /// The channel's capacity, Ah (the start when it is fitted too).
    pub capacity_ah: f64,
    pub fit_capacity: bool,
    pub anchor: Option<SocAnchorPoint>,
}

/// A fitted value and its standard uncertainty (1σ).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Fitted {
    pub value: f64,
    pub sigma: f64,
}

/// The proposal: parameters with σ, and how well they explain the rests.
#[derive(Debug, Clone, PartialEq)]
pub struct NernstFit {
    pub e_formal_298_volts: Fitted,
    pub n_apparent: Fitted,
    pub soc_at_first_rest: Fitted,
    /// Fitted only when asked; otherwise the channel's, σ 0.
    pub capacity_ah: Fitted,
    /// Measured minus model, per rest, V per cell.
    pub residuals_volts: Vec<f64>,
    pub residual_rms_volts: f64,
    /// SOC of each rest under the fitted parameters.
    pub soc_at_rests: Vec<f64>,
    pub rests_used: usize,
    pub degrees_of_freedom: usize,
    pub iterations: u32,
    /// Correlation of E°′ and SOC₀ (close to ±1: the rests span too little
    /// SOC to tell a shifted potential from a shifted SOC).
    pub correlation_e_soc0: f64,
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum FitError {
    #[error(
        "{have} settled rests; the fit of {params} parameters needs at least {need} (rest the cell at a few more states of charge)"
    )]
    TooFewRests {
        have: usize,
        need: usize,
        params: usize,
    },
    #[error(
        "the rests do not tell the parameters apart (they span {soc_span:.3} of SOC by the counted charge; rest the cell further apart)"
    )]
    Degenerate { soc_span: f64 },
    #[error(
        "no parameters keep every rest's SOC inside (0, 1): is the capacity right, and the current's sign?"
    )]
    OutsideSoc,
    #[error("a rest's value is not finite (rest {index})")]
    NotFinite { index: usize },
}

/// Gathers calibration points from a run's stored readings in time order:
/// one per settled rest, its last settled reading (the most relaxed).
#[derive(Debug, Default)]
pub struct RestCollector {
    rests: Vec<(u64, RestPoint)>,
    in_rest: bool,
    /// The count at the last reading at or before the anchor's time.
    anchor_charge: Option<f64>,
}

impl RestCollector {
    /// One stored reading; `settled` is its settled-rest flag.
    pub fn push(&mut self, seq: u64, point: RestPoint, settled: bool) {
        if settled {
            if self.in_rest {
                self.rests.pop();
            }
            self.rests.push((seq, point));
        }
        self.in_rest = settled;
    }

    /// Notes the count of a reading at or before an operator's anchor.
    pub fn note_anchor_charge(&mut self, charge_ah: f64) {
        self.anchor_charge = Some(charge_ah);
    }

    pub fn anchor_charge(&self) -> Option<f64> {
        self.anchor_charge
    }

    /// (seq, rest) per settled rest, in time order.
    pub fn finish(self) -> Vec<(u64, RestPoint)> {
        self.rests
    }
}

/// Levenberg–Marquardt bounds: plenty for 3–4 parameters from a start
/// within a few tens of mV.
const MAX_ITERATIONS: u32 = 200;
/// SOC may come this close to 0 or 1 during the search (ln Q diverges at
/// the ends).
const SOC_MARGIN: f64 = 1e-6;

/// The parameter vector: E°′, n_app, SOC₀, and 1/C when fitted.
#[derive(Debug, Clone, Copy)]
struct Params {
    e: f64,
    n: f64,
    soc0: f64,
    inv_c: f64,
}

/// What a fit holds fixed and what it moves.
struct Problem<'a> {
    setup: &'a FitSetup<'a>,
    points: &'a [RestPoint],
}

impl Problem<'_> {
    fn n_params(&self) -> usize {
        let soc0 = usize::from(self.setup.anchor.is_none());
        2 + soc0 + usize::from(self.setup.fit_capacity)
    }

    /// SOC of rest `p` and d(SOC)/d(1/C).
    fn soc_of(&self, x: &Params, p: &RestPoint) -> (f64, f64) {
        match self.setup.anchor {
            Some(a) => {
                let dq = p.charge_ah - a.charge_ah;
                (a.soc + dq * x.inv_c, dq)
            }
            None => {
                let dq = p.charge_ah - self.points[0].charge_ah;
                (x.soc0 + dq * x.inv_c, dq)
            }
        }
    }

    fn voltage(&self, x: &Params, p: &RestPoint) -> Option<(f64, [f64; 4])> {
        let (soc, dsoc_dinv_c) = self.soc_of(x, p);
        if !(SOC_MARGIN..=1.0 - SOC_MARGIN).contains(&soc) || x.n <= 0.0 {
            return None;
        }
        let rt_f = GAS_CONSTANT_J_PER_MOL_K * p.temp_k / FARADAY_C_PER_MOL;
        let ln_q = self.setup.model.ln_q(soc);
        let dln_q = d_ln_q_d_soc(self.setup.model, soc);
        let e =
            x.e + self.setup.de_dt_volts_per_k * (p.temp_k - STANDARD_TEMP_K) - rt_f / x.n * ln_q;
        let de_dsoc = -rt_f / x.n * dln_q;
        // ∂E/∂E°′, ∂E/∂n, ∂E/∂SOC₀, ∂E/∂(1/C)
        let grad = [
            1.0,
            rt_f / (x.n * x.n) * ln_q,
            de_dsoc,
            de_dsoc * dsoc_dinv_c,
        ];
        Some((e, grad))
    }

    /// Residuals (model − measured) and the Jacobian's rows over the moved
    /// parameters; `None` if a rest leaves (0, 1).
    fn evaluate(&self, x: &Params) -> Option<(Vec<f64>, Vec<Vec<f64>>)> {
        let mut r = Vec::with_capacity(self.points.len());
        let mut j = Vec::with_capacity(self.points.len());
        for p in self.points {
            let (e, g) = self.voltage(x, p)?;
            r.push(e - p.cell_volts);
            j.push(self.moved(g));
        }
        Some((r, j))
    }

    fn moved(&self, g: [f64; 4]) -> Vec<f64> {
        let mut row = vec![g[0], g[1]];
        if self.setup.anchor.is_none() {
            row.push(g[2]);
        }
        if self.setup.fit_capacity {
            row.push(g[3]);
        }
        row
    }

    fn step(&self, x: &Params, d: &[f64]) -> Params {
        let mut y = *x;
        y.e += d[0];
        y.n += d[1];
        let mut k = 2;
        if self.setup.anchor.is_none() {
            y.soc0 += d[k];
            k += 1;
        }
        if self.setup.fit_capacity {
            y.inv_c += d[k];
        }
        y
    }
}

/// d(ln Q)/d(SOC) = Σ ν·a′/a over the species whose activity moves.
fn d_ln_q_d_soc(model: &NernstModel, soc: f64) -> f64 {
    model
        .species
        .iter()
        .map(|s| match s.activity {
            Activity::Fixed { .. } => 0.0,
            Activity::Linear { per_soc, .. } => s.nu * per_soc / s.activity.at(soc),
        })
        .sum()
}

fn sum_sq(r: &[f64]) -> f64 {
    r.iter().map(|v| v * v).sum()
}

/// JᵀJ and Jᵀr.
fn normal_equations(j: &[Vec<f64>], r: &[f64]) -> (Vec<Vec<f64>>, Vec<f64>) {
    let p = j[0].len();
    let mut a = vec![vec![0.0; p]; p];
    let mut g = vec![0.0; p];
    for (row, ri) in j.iter().zip(r) {
        for k in 0..p {
            g[k] += row[k] * ri;
            for l in 0..p {
                a[k][l] += row[k] * row[l];
            }
        }
    }
    (a, g)
}

/// Solves a·x = b by Gaussian elimination with partial pivoting; `None`
/// when a is singular to working precision.
fn solve(mut a: Vec<Vec<f64>>, mut b: Vec<f64>) -> Option<Vec<f64>> {
    let n = b.len();
    let scale = a
        .iter()
        .flatten()
        .fold(0.0f64, |m, v| m.max(v.abs()))
        .max(f64::MIN_POSITIVE);
    for col in 0..n {
        let pivot = (col..n).max_by(|&x, &y| a[x][col].abs().total_cmp(&a[y][col].abs()))?;
        if a[pivot][col].abs() <= 1e-14 * scale {
            return None;
        }
        a.swap(col, pivot);
        b.swap(col, pivot);
        let (upper, lower) = a.split_at_mut(col + 1);
        let pivot_row = &upper[col];
        for (offset, row) in lower.iter_mut().enumerate() {
            let f = row[col] / pivot_row[col];
            for (x, p) in row[col..].iter_mut().zip(&pivot_row[col..]) {
                *x -= f * p;
            }
            b[col + 1 + offset] -= f * b[col];
        }
    }
    let mut x = vec![0.0; n];
    for row in (0..n).rev() {
        let s: f64 = (row + 1..n).map(|k| a[row][k] * x[k]).sum();
        x[row] = (b[row] - s) / a[row][row];
    }
    Some(x)
}

/// (JᵀJ)⁻¹, column by column.
fn inverse(a: &[Vec<f64>]) -> Option<Vec<Vec<f64>>> {
    let n = a.len();
    let mut inv = vec![vec![0.0; n]; n];
    for col in 0..n {
        let mut e = vec![0.0; n];
        e[col] = 1.0;
        let x = solve(a.to_vec(), e)?;
        for row in 0..n {
            inv[row][col] = x[row];
        }
    }
    Some(inv)
}

/// A start inside the feasible SOC range: SOC₀ from the built-in model at
/// the first rest, moved so that every rest's SOC lies in (0, 1).
fn start(problem: &Problem, points: &[RestPoint]) -> Result<Params, FitError> {
    let s = problem.setup;
    let inv_c = 1.0 / s.capacity_ah;
    let first = points[0];
    let rt_nf =
        GAS_CONSTANT_J_PER_MOL_K * first.temp_k / (f64::from(s.n_electrons) * FARADAY_C_PER_MOL);
    let e_now = s.e_standard_298_volts + s.de_dt_volts_per_k * (first.temp_k - STANDARD_TEMP_K);
    let guess = s.model.soc_at_ln_q((e_now - first.cell_volts) / rt_nf).soc;
    let dq: Vec<f64> = points
        .iter()
        .map(|p| (p.charge_ah - first.charge_ah) * inv_c)
        .collect();
    let (lo, hi) = dq
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), v| {
            (l.min(*v), h.max(*v))
        });
    // SOC₀ + dq_i ∈ [m, 1 − m] for every rest.
    let (min_soc0, max_soc0) = (0.01 - lo, 0.99 - hi);
    if s.anchor.is_none() && min_soc0 > max_soc0 {
        return Err(FitError::OutsideSoc);
    }
    let soc0 = if s.anchor.is_none() {
        guess.clamp(min_soc0, max_soc0)
    } else {
        0.0
    };
    Ok(Params {
        e: s.e_standard_298_volts,
        n: f64::from(s.n_electrons),
        soc0,
        inv_c,
    })
}

/// Fits E°′, n_app and SOC₀ (and C if asked) to the rests.
pub fn fit_nernst(points: &[RestPoint], setup: &FitSetup) -> Result<NernstFit, FitError> {
    if let Some(index) = points.iter().position(|p| {
        !(p.cell_volts.is_finite() && p.temp_k.is_finite() && p.charge_ah.is_finite())
    }) {
        return Err(FitError::NotFinite { index });
    }
    let problem = Problem { setup, points };
    let p = problem.n_params();
    if points.len() <= p {
        return Err(FitError::TooFewRests {
            have: points.len(),
            need: p + 1,
            params: p,
        });
    }
    let mut x = start(&problem, points)?;
    let (mut r, mut j) = problem.evaluate(&x).ok_or(FitError::OutsideSoc)?;
    let mut ssr = sum_sq(&r);
    let mut lambda = 1e-3;
    let mut iterations = 0;
    while iterations < MAX_ITERATIONS {
        iterations += 1;
        let (a, g) = normal_equations(&j, &r);
        let mut damped = a.clone();
        for k in 0..p {
            damped[k][k] += lambda * a[k][k].max(1e-12);
        }
        let minus_g: Vec<f64> = g.iter().map(|v| -v).collect();
        let Some(d) = solve(damped, minus_g) else {
            lambda *= 10.0;
            continue;
        };
        let trial = problem.step(&x, &d);
        match problem.evaluate(&trial) {
            Some((r2, j2)) if sum_sq(&r2) <= ssr => {
                let improved = ssr - sum_sq(&r2);
                x = trial;
                (r, j) = (r2, j2);
                ssr = sum_sq(&r);
                lambda = (lambda / 3.0).max(1e-12);
                if improved <= 1e-15 * ssr.max(1e-30) || ssr < 1e-30 {
                    break;
                }
            }
            _ => {
                lambda *= 4.0;
                if lambda > 1e12 {
                    break;
                }
            }
        }
    }
    finish(&problem, x, &r, &j, iterations)
}

/// σ from s²·(JᵀJ)⁻¹ and the figures a proposal shows.
fn finish(
    problem: &Problem,
    x: Params,
    r: &[f64],
    j: &[Vec<f64>],
    iterations: u32,
) -> Result<NernstFit, FitError> {
    let (m, p) = (r.len(), problem.n_params());
    let dof = m - p;
    let s2 = sum_sq(r) / dof as f64;
    let socs: Vec<f64> = problem
        .points
        .iter()
        .map(|pt| problem.soc_of(&x, pt).0)
        .collect();
    let soc_span = socs.iter().cloned().fold(f64::NEG_INFINITY, f64::max)
        - socs.iter().cloned().fold(f64::INFINITY, f64::min);
    let (a, _) = normal_equations(j, r);
    let cov = inverse(&a).ok_or(FitError::Degenerate { soc_span })?;
    let sigma = |k: usize| (cov[k][k] * s2).max(0.0).sqrt();
    let soc0_index = problem.setup.anchor.is_none().then_some(2);
    let soc0 = match problem.setup.anchor {
        None => x.soc0,
        Some(a) => a.soc + (problem.points[0].charge_ah - a.charge_ah) * x.inv_c,
    };
    let capacity = if problem.setup.fit_capacity {
        let k = p - 1;
        // σ(C) from σ(1/C): |dC/d(1/C)| = C².
        let c = 1.0 / x.inv_c;
        Fitted {
            value: c,
            sigma: sigma(k) * c * c,
        }
    } else {
        Fitted {
            value: problem.setup.capacity_ah,
            sigma: 0.0,
        }
    };
    let correlation = soc0_index.map_or(0.0, |k| cov[0][k] / (cov[0][0] * cov[k][k]).sqrt());
    Ok(NernstFit {
        e_formal_298_volts: Fitted {
            value: x.e,
            sigma: sigma(0),
        },
        n_apparent: Fitted {
            value: x.n,
            sigma: sigma(1),
        },
        soc_at_first_rest: Fitted {
            value: soc0,
            sigma: soc0_index.map_or(0.0, sigma),
        },
        capacity_ah: capacity,
        residuals_volts: r.iter().map(|v| -v).collect(),
        residual_rms_volts: (sum_sq(r) / m as f64).sqrt(),
        soc_at_rests: socs,
        rests_used: m,
        degrees_of_freedom: dof,
        iterations,
        correlation_e_soc0: correlation,
    })
}

/// Two-sided 95 % quantile of Student's t for `dof` degrees of freedom
/// (for a 95 % interval value ± t·σ): dof 1–30 from the standard table
/// (NIST/SEMATECH e-Handbook of Statistical Methods, table 1.4.2.3;
/// checked against SciPy `t.ppf(0.975, dof)` in
/// `tests/reference/ocv_fit_scipy.py`), the normal 1.960 beyond.
pub fn t_95(dof: usize) -> f64 {
    const TABLE: [f64; 30] = [
        12.706, 4.303, 3.182, 2.776, 2.571, 2.447, 2.365, 2.306, 2.262, 2.228, 2.201, 2.179, 2.160,
        2.145, 2.131, 2.120, 2.110, 2.101, 2.093, 2.086, 2.080, 2.074, 2.069, 2.064, 2.060, 2.056,
        2.052, 2.048, 2.045, 2.042,
    ];
    match dof {
        0 => f64::INFINITY,
        1..=30 => TABLE[dof - 1],
        _ => 1.960,
    }
}

#[cfg(test)]
mod tests;
