use super::*;
use crate::electrochem::soc::SocModel;
use crate::electrochem::{Chemistry, Registry};

fn vanadium() -> std::sync::Arc<Chemistry> {
    Registry::builtin().get("vanadium-redox").unwrap()
}

fn model_of(c: &Chemistry) -> &NernstModel {
    match &c.soc_model {
        SocModel::Nernst(m) => m,
        _ => panic!("not a Nernst chemistry"),
    }
}

fn setup(c: &Chemistry) -> FitSetup<'_> {
    FitSetup {
        model: model_of(c),
        n_electrons: c.n_electrons,
        e_standard_298_volts: c.e_standard_298_volts,
        de_dt_volts_per_k: c.de_dt_volts_per_k,
        capacity_ah: 10.0,
        fit_capacity: false,
        anchor: None,
    }
}

/// The constructed rests of `tests/reference/ocv_fit_scipy.py`: true
/// E°′ 1.316 V, n_app 0.95, SOC₀ 0.18, C 10 Ah.
const SOC: [f64; 12] = [
    0.18, 0.27, 0.36, 0.45, 0.55, 0.64, 0.73, 0.82, 0.76, 0.61, 0.47, 0.33,
];
const TEMP_K: [f64; 12] = [
    296.4, 297.8, 299.1, 300.5, 301.2, 302.8, 303.9, 305.1, 304.0, 301.9, 299.7, 297.3,
];
/// The script's volts (true model plus its fixed noise, to 1 µV).
const VOLTS: [f64; 12] = [
    1.319681, 1.342033, 1.364920, 1.387944, 1.408970, 1.430629, 1.454412, 1.479977, 1.464016,
    1.423787, 1.390230, 1.361495,
];

/// What the true parameters give at each rest, without noise.
fn true_volts(c: &Chemistry, e: f64, n: f64, soc: f64, temp_k: f64) -> f64 {
    let rt_f = GAS_CONSTANT_J_PER_MOL_K * temp_k / FARADAY_C_PER_MOL;
    e + c.de_dt_volts_per_k * (temp_k - STANDARD_TEMP_K) - rt_f / n * model_of(c).ln_q(soc)
}

fn rests(mut volts: impl FnMut(usize) -> f64) -> Vec<RestPoint> {
    (0..SOC.len())
        .map(|i| RestPoint {
            time_ns: i as i64 * 3_600_000_000_000,
            cell_volts: volts(i),
            temp_k: TEMP_K[i],
            charge_ah: (SOC[i] - 0.18) * 10.0,
        })
        .collect()
}

#[test]
fn noiseless_rests_give_back_the_parameters_they_were_made_from() {
    let c = vanadium();
    let points = rests(|i| true_volts(&c, 1.316, 0.95, SOC[i], TEMP_K[i]));
    let fit = fit_nernst(&points, &setup(&c)).unwrap();
    assert!(
        (fit.e_formal_298_volts.value - 1.316).abs() < 1e-9,
        "{fit:?}"
    );
    assert!((fit.n_apparent.value - 0.95).abs() < 1e-8, "{fit:?}");
    assert!((fit.soc_at_first_rest.value - 0.18).abs() < 1e-8, "{fit:?}");
    assert!(fit.residual_rms_volts < 1e-10, "{fit:?}");
    assert_eq!((fit.rests_used, fit.degrees_of_freedom), (12, 9));
}

/// Against SciPy 1.17.1 `curve_fit` on the same rests
/// (`tests/reference/ocv_fit_scipy.py` prints these).
#[test]
fn the_fit_and_its_sigmas_agree_with_scipy() {
    let c = vanadium();
    let fit = fit_nernst(&rests(|i| VOLTS[i]), &setup(&c)).unwrap();
    let close = |got: f64, want: f64, what: &str| {
        assert!(
            ((got - want) / want).abs() < 1e-6,
            "{what}: {got} against SciPy's {want}"
        );
    };
    close(fit.e_formal_298_volts.value, 1.3136800773, "E°′");
    close(fit.e_formal_298_volts.sigma, 0.0029862422, "σ(E°′)");
    close(fit.n_apparent.value, 0.9471662208, "n_app");
    close(fit.n_apparent.sigma, 0.0097801407, "σ(n_app)");
    close(fit.soc_at_first_rest.value, 0.1876553455, "SOC₀");
    close(fit.soc_at_first_rest.sigma, 0.0107896331, "σ(SOC₀)");
    close(fit.residual_rms_volts, 1.5524325535e-3, "residual RMS");
}

/// A small deterministic normal generator (xorshift64* and Box–Muller):
/// the Monte Carlo must not depend on a crate's stream.
struct Noise(u64);

impl Noise {
    fn uniform(&mut self) -> f64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        ((self.0.wrapping_mul(0x2545_f491_4f6c_dd1d) >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }

    fn normal(&mut self) -> f64 {
        let (u, v) = (self.uniform(), self.uniform());
        (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
    }
}

/// The 95 % intervals value ± t·σ must cover the truth about 95 % of the
/// time (JCGM 101's check of an uncertainty by simulation): at least 90 %
/// over 200 repeats with 1 mV of noise.
#[test]
fn ninety_five_percent_intervals_cover_the_truth() {
    let c = vanadium();
    let mut noise = Noise(0x9e37_79b9_7f4a_7c15);
    let (mut e_in, mut n_in, mut soc_in) = (0, 0, 0);
    const REPEATS: usize = 200;
    for _ in 0..REPEATS {
        let points =
            rests(|i| true_volts(&c, 1.316, 0.95, SOC[i], TEMP_K[i]) + 1e-3 * noise.normal());
        let fit = fit_nernst(&points, &setup(&c)).unwrap();
        let t = t_95(fit.degrees_of_freedom);
        let covers = |f: Fitted, truth: f64| (f.value - truth).abs() <= t * f.sigma;
        e_in += usize::from(covers(fit.e_formal_298_volts, 1.316));
        n_in += usize::from(covers(fit.n_apparent, 0.95));
        soc_in += usize::from(covers(fit.soc_at_first_rest, 0.18));
    }
    for (what, inside) in [("E°′", e_in), ("n_app", n_in), ("SOC₀", soc_in)] {
        let share = inside as f64 / REPEATS as f64;
        eprintln!("{what}: {share:.3} of 95 % intervals cover the truth");
        assert!(
            share >= 0.90,
            "{what}: {share:.3} of 95 % intervals cover the truth"
        );
    }
}

#[test]
fn an_anchor_fixes_the_soc_and_the_capacity_can_be_fitted_too() {
    let c = vanadium();
    let points = rests(|i| true_volts(&c, 1.316, 0.95, SOC[i], TEMP_K[i]));
    // The operator entered SOC 0.18 when the count stood at 0 Ah.
    let anchored = FitSetup {
        anchor: Some(SocAnchorPoint {
            soc: 0.18,
            charge_ah: 0.0,
        }),
        ..setup(&c)
    };
    let fit = fit_nernst(&points, &anchored).unwrap();
    assert!(
        (fit.e_formal_298_volts.value - 1.316).abs() < 1e-9,
        "{fit:?}"
    );
    assert_eq!(fit.soc_at_first_rest.sigma, 0.0);
    assert_eq!(fit.degrees_of_freedom, 10);
    // A capacity 20 % off as the start; fitted back with its σ.
    let with_c = FitSetup {
        capacity_ah: 12.0,
        fit_capacity: true,
        ..anchored
    };
    let fit = fit_nernst(&points, &with_c).unwrap();
    assert!((fit.capacity_ah.value - 10.0).abs() < 1e-6, "{fit:?}");
    assert!(fit.capacity_ah.sigma < 1e-6, "{fit:?}");
}

#[test]
fn too_few_or_impossible_rests_are_refused_saying_why() {
    let c = vanadium();
    let points = rests(|i| VOLTS[i]);
    let e = fit_nernst(&points[..3], &setup(&c)).unwrap_err();
    assert_eq!(
        e,
        FitError::TooFewRests {
            have: 3,
            need: 4,
            params: 3
        }
    );
    // 10 Ah counted between rests of a 1 Ah cell: no SOC₀ fits them all.
    let small = FitSetup {
        capacity_ah: 1.0,
        ..setup(&c)
    };
    assert_eq!(
        fit_nernst(&points, &small).unwrap_err(),
        FitError::OutsideSoc
    );
    let mut broken = points.clone();
    broken[4].cell_volts = f64::NAN;
    assert_eq!(
        fit_nernst(&broken, &setup(&c)).unwrap_err(),
        FitError::NotFinite { index: 4 }
    );
}

#[test]
fn the_t_table_matches_scipy() {
    // SciPy 1.17.1 t.ppf(0.975, dof), rounded to 3 decimals.
    assert_eq!(t_95(1), 12.706);
    assert_eq!(t_95(9), 2.262);
    assert_eq!(t_95(30), 2.042);
    assert_eq!(t_95(31), 1.960);
    assert!(t_95(0).is_infinite());
}

#[test]
fn each_settled_rest_gives_its_last_settled_reading() {
    let at = |t: i64, v: f64| RestPoint {
        time_ns: t,
        cell_volts: v,
        temp_k: 298.15,
        charge_ah: t as f64,
    };
    let mut c = RestCollector::default();
    let flags = [
        false, true, true, true, false, false, true, false, true, true,
    ];
    for (i, settled) in flags.iter().enumerate() {
        c.push(i as u64, at(i as i64, 1.0 + i as f64), *settled);
    }
    let seqs: Vec<u64> = c.finish().iter().map(|(s, _)| *s).collect();
    assert_eq!(seqs, [3, 6, 9]);
}
