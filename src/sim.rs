//! A simulated cell for demos, benchmarks and tests with known truth.
//!
//! Terminal voltage = OCV(SOC, T) of the chemistry (a water cell: its
//! reversible voltage with saturated gases at 1 atm) + activation
//! overpotential + I·R_ohmic + a first-order polarisation (R_p with time
//! constant τ) + Gaussian noise; SOC follows the current exactly. Pure and deterministic for a seed: time
//! advances only when the caller says so.
// Item docs here are still being written (DEVELOPERS.md, "Documentation").
#![allow(missing_docs)]

use crate::electrochem::{self, Chemistry, NernstContext};

/// Small, fast, seedable generator (xorshift64*, Vigna 2016); statistical
/// quality is ample for measurement noise and it keeps the crate free of a
/// random-number dependency.
#[derive(Debug, Clone)]
pub struct Rng(u64);

impl Rng {
    pub fn new(seed: u64) -> Rng {
        Rng(seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1)
    }
    pub fn next_u64(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_F491_4F6C_DD1D)
    }
    /// Uniform in (0, 1).
    pub fn uniform(&mut self) -> f64 {
        ((self.next_u64() >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }
    /// Standard normal (Box–Muller).
    pub fn normal(&mut self) -> f64 {
        let (u1, u2) = (self.uniform(), self.uniform());
        (-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos()
    }
}

#[derive(Debug, Clone)]
pub struct SimCellParams {
    pub cells_in_series: u32,
    pub capacity_ah: f64,
    pub resistance_ohm: f64,
    pub polarisation_ohm: f64,
    pub polarisation_tau_s: f64,
    pub noise_volts: f64,
    pub temp_k: f64,
    /// Temperature swing (K) with a period of `temp_period_s`.
    pub temp_swing_k: f64,
    pub temp_period_s: f64,
    /// Activation overpotential per cell, Butler–Volmer with symmetric
    /// transfer: b·asinh(I / 2·i0). `exchange_amps` 0 = none.
    pub tafel_volts: f64,
    pub exchange_amps: f64,
}

/// True state of the simulated cell.
#[derive(Debug, Clone)]
pub struct SimCell {
    pub params: SimCellParams,
    pub soc: f64,
    pub polarisation_volts: f64,
    pub elapsed_s: f64,
    rng: Rng,
}

/// One simulated measurement, charge-positive current.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SimSample {
    pub stack_volts: f64,
    pub amps: f64,
    pub temp_k: f64,
    /// Truth, for tests.
    pub true_soc: f64,
    pub true_ocv_stack_volts: f64,
}

impl SimCell {
    pub fn new(params: SimCellParams, soc: f64, seed: u64) -> SimCell {
        SimCell {
            params,
            soc,
            polarisation_volts: 0.0,
            elapsed_s: 0.0,
            rng: Rng::new(seed),
        }
    }

    pub fn temp_k(&self) -> f64 {
        let p = &self.params;
        if p.temp_period_s > 0.0 {
            p.temp_k
                + p.temp_swing_k * (std::f64::consts::TAU * self.elapsed_s / p.temp_period_s).sin()
        } else {
            p.temp_k
        }
    }

    /// Open-circuit stack voltage at the current truth.
    pub fn ocv_stack_volts(&self, chemistry: &Chemistry) -> f64 {
        let temp_k = self.temp_k();
        let cells = f64::from(self.params.cells_in_series);
        if chemistry.id == electrochem::builtin::WATER_CELL_ID {
            let gas = electrochem::hydrogen::GasConditions {
                saturated: true,
                ..Default::default()
            };
            return electrochem::hydrogen::reversible_cell_volts(temp_k, &gas) * cells;
        }
        let ctx = NernstContext {
            n_electrons: chemistry.n_electrons,
            e_standard_volts: chemistry.standard_potential().at(temp_k),
            temp_k,
        };
        let cell = chemistry
            .soc_model
            .ocv_volts(self.soc, ctx)
            .unwrap_or(ctx.e_standard_volts);
        cell * cells
    }

    /// Activation overpotential of the stack at `amps`.
    fn activation_stack_volts(&self, amps: f64) -> f64 {
        let p = &self.params;
        if p.exchange_amps <= 0.0 {
            return 0.0;
        }
        p.tafel_volts * (amps / (2.0 * p.exchange_amps)).asinh() * f64::from(p.cells_in_series)
    }

    /// Advances `dt_s` at charge-positive current `amps` and measures.
    pub fn step(&mut self, chemistry: &Chemistry, amps: f64, dt_s: f64) -> SimSample {
        let p = self.params.clone();
        self.elapsed_s += dt_s;
        if p.capacity_ah > 0.0 {
            self.soc = (self.soc + amps * dt_s / (3600.0 * p.capacity_ah)).clamp(0.0, 1.0);
        }
        if p.polarisation_tau_s > 0.0 {
            let target = amps * p.polarisation_ohm;
            let decay = (-dt_s / p.polarisation_tau_s).exp();
            self.polarisation_volts = target + (self.polarisation_volts - target) * decay;
        }
        let ocv = self.ocv_stack_volts(chemistry);
        let noise = p.noise_volts * self.rng.normal();
        SimSample {
            stack_volts: ocv
                + self.activation_stack_volts(amps)
                + amps * p.resistance_ohm
                + self.polarisation_volts
                + noise,
            amps,
            temp_k: self.temp_k(),
            true_soc: self.soc,
            true_ocv_stack_volts: ocv,
        }
    }
}

/// A constant-current schedule: charge to a cutoff SOC, rest, discharge to
/// a floor, rest, repeat.
#[derive(Debug, Clone)]
pub struct CycleSchedule {
    pub charge_amps: f64,
    pub discharge_amps: f64,
    pub high_soc: f64,
    pub low_soc: f64,
    pub rest_s: f64,
    phase: Phase,
    phase_elapsed_s: f64,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Phase {
    Charge,
    RestAfterCharge,
    Discharge,
    RestAfterDischarge,
}

impl CycleSchedule {
    pub fn new(
        charge_amps: f64,
        discharge_amps: f64,
        low_soc: f64,
        high_soc: f64,
        rest_s: f64,
    ) -> CycleSchedule {
        CycleSchedule {
            charge_amps,
            discharge_amps,
            high_soc,
            low_soc,
            rest_s,
            phase: Phase::Charge,
            phase_elapsed_s: 0.0,
        }
    }

    /// Begins with a rest, as a test does to read the cell's open-circuit
    /// voltage before the first charge.
    pub fn resting_first(mut self) -> CycleSchedule {
        self.phase = Phase::RestAfterDischarge;
        self
    }

    /// Current for the next step, given the true SOC now.
    pub fn amps(&mut self, soc: f64, dt_s: f64) -> f64 {
        self.phase_elapsed_s += dt_s;
        let next = match self.phase {
            Phase::Charge if soc >= self.high_soc => Some(Phase::RestAfterCharge),
            Phase::RestAfterCharge if self.phase_elapsed_s >= self.rest_s => Some(Phase::Discharge),
            Phase::Discharge if soc <= self.low_soc => Some(Phase::RestAfterDischarge),
            Phase::RestAfterDischarge if self.phase_elapsed_s >= self.rest_s => Some(Phase::Charge),
            _ => None,
        };
        if let Some(phase) = next {
            self.phase = phase;
            self.phase_elapsed_s = 0.0;
        }
        match self.phase {
            Phase::Charge => self.charge_amps,
            Phase::Discharge => -self.discharge_amps,
            _ => 0.0,
        }
    }
}

/// ΔG of the true open-circuit state, for checking estimates.
pub fn true_delta_g_kj_per_mol(chemistry: &Chemistry, sample: &SimSample, cells: u32) -> f64 {
    electrochem::thermo::delta_g_kj_per_mol(
        chemistry.n_electrons,
        sample.true_ocv_stack_volts / f64::from(cells),
    )
}
