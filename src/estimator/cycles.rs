//! Cycle segmentation: a cycle is a charge segment followed by a discharge
//! segment (rests in between belong to the cycle). Totals come from the
//! estimator's running counters, so a cycle's figures are differences of
//! integrals, with no second integration to drift from the first.

use serde::{Deserialize, Serialize};

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Direction {
    Charge,
    Discharge,
    Rest,
}

#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Observation {
    pub time_ns: i64,
    pub direction: Direction,
    pub cell_volts: f64,
    pub delta_g_kj_per_mol: f64,
    pub soc: Option<f64>,
    pub charge_in_ah: f64,
    pub charge_out_ah: f64,
    pub energy_in_wh: f64,
    pub energy_out_wh: f64,
}

/// Running sums of one segment kind.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, Default)]
pub struct SegmentSums {
    pub readings: u64,
    pub cell_volts_sum: f64,
    pub delta_g_sum: f64,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct OpenCycle {
    pub start_ns: i64,
    pub start_soc: Option<f64>,
    pub charge_in_start_ah: f64,
    pub charge_out_start_ah: f64,
    pub energy_in_start_wh: f64,
    pub energy_out_start_wh: f64,
    pub charge: SegmentSums,
    pub discharge: SegmentSums,
    pub last_ns: i64,
    pub last_soc: Option<f64>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct CycleTracker {
    pub open: Option<OpenCycle>,
    pub completed: u32,
}

/// A finished cycle.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CycleRecord {
    pub index: u32,
    pub start_ns: i64,
    pub end_ns: i64,
    pub charge_in_ah: f64,
    pub charge_out_ah: f64,
    pub energy_in_wh: f64,
    pub energy_out_wh: f64,
    pub coulombic_efficiency: Option<f64>,
    pub energy_efficiency: Option<f64>,
    /// Mean discharge voltage over mean charge voltage.
    pub voltage_efficiency: Option<f64>,
    pub mean_delta_g_charge_kj_per_mol: Option<f64>,
    pub mean_delta_g_discharge_kj_per_mol: Option<f64>,
    pub start_soc: Option<f64>,
    pub end_soc: Option<f64>,
}

fn ratio(num: f64, den: f64) -> Option<f64> {
    (den > 0.0).then(|| num / den)
}

fn mean(sum: f64, n: u64) -> Option<f64> {
    (n > 0).then(|| sum / n as f64)
}

impl CycleTracker {
    /// Records one reading; returns the cycle it closed, if any.
    pub fn observe(&mut self, o: Observation) -> Option<CycleRecord> {
        let mut closed = None;
        if o.direction == Direction::Charge
            && let Some(open) = &self.open
            && open.discharge.readings > 0
        {
            closed = Some(self.close(&o));
        }
        if self.open.is_none() && o.direction == Direction::Charge {
            self.open = Some(OpenCycle {
                start_ns: o.time_ns,
                start_soc: o.soc,
                charge_in_start_ah: o.charge_in_ah,
                charge_out_start_ah: o.charge_out_ah,
                energy_in_start_wh: o.energy_in_wh,
                energy_out_start_wh: o.energy_out_wh,
                charge: SegmentSums::default(),
                discharge: SegmentSums::default(),
                last_ns: o.time_ns,
                last_soc: o.soc,
            });
        }
        if let Some(open) = &mut self.open {
            let sums = match o.direction {
                Direction::Charge => Some(&mut open.charge),
                Direction::Discharge => Some(&mut open.discharge),
                Direction::Rest => None,
            };
            if let Some(s) = sums {
                s.readings += 1;
                s.cell_volts_sum += o.cell_volts;
                s.delta_g_sum += o.delta_g_kj_per_mol;
            }
            open.last_ns = o.time_ns;
            open.last_soc = o.soc;
        }
        closed
    }

    fn close(&mut self, at: &Observation) -> CycleRecord {
        let open = self.open.take().expect("close called with an open cycle");
        self.completed += 1;
        let charge_in_ah = at.charge_in_ah - open.charge_in_start_ah;
        let charge_out_ah = at.charge_out_ah - open.charge_out_start_ah;
        let energy_in_wh = at.energy_in_wh - open.energy_in_start_wh;
        let energy_out_wh = at.energy_out_wh - open.energy_out_start_wh;
        let mean_charge_v = mean(open.charge.cell_volts_sum, open.charge.readings);
        let mean_discharge_v = mean(open.discharge.cell_volts_sum, open.discharge.readings);
        CycleRecord {
            index: self.completed,
            start_ns: open.start_ns,
            end_ns: open.last_ns,
            charge_in_ah,
            charge_out_ah,
            energy_in_wh,
            energy_out_wh,
            coulombic_efficiency: ratio(charge_out_ah, charge_in_ah),
            energy_efficiency: ratio(energy_out_wh, energy_in_wh),
            voltage_efficiency: match (mean_discharge_v, mean_charge_v) {
                (Some(d), Some(c)) => ratio(d, c),
                _ => None,
            },
            mean_delta_g_charge_kj_per_mol: mean(open.charge.delta_g_sum, open.charge.readings),
            mean_delta_g_discharge_kj_per_mol: mean(
                open.discharge.delta_g_sum,
                open.discharge.readings,
            ),
            start_soc: open.start_soc,
            end_soc: open.last_soc,
        }
    }
}
