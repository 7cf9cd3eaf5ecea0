"""Check values for the OCV fit (src/estimator/ocv_fit/tests.rs).

SciPy 1.17.1 `curve_fit` (Levenberg-Marquardt, absolute_sigma=False, so
pcov = s^2 (J^T J)^-1) fits the same Nernst model to the same twelve
constructed rests of a vanadium cell; the Rust fit must agree to 1e-6
relative. Also prints Student's t 97.5 % quantiles for the t_95 table.

The rests are constructed, not measured: E0' = 1.316 V, n_app = 0.95,
SOC at the first rest 0.18, capacity 10 Ah, with fixed noise (numpy
default_rng(20261204).normal(0, 1e-3), rounded to 1 uV and written out).

    python3 tests/reference/ocv_fit_scipy.py
"""
import numpy as np
from scipy.optimize import curve_fit
from scipy.stats import t as student_t

# CODATA 2018 exact: e, N_A, k.
F = 1.602176634e-19 * 6.02214076e23
R = 1.380649e-23 * 6.02214076e23
T_REF = 298.15
# Built-in vanadium-redox: dE/dT = dS/(nF), species (nu, per_soc, at_zero_soc).
DE_DT = -121.6 / F
SPECIES = [(-1, 1.6, 0.016), (-1, 1.6, 0.016), (1, -1.6, 1.616), (1, -1.6, 1.616), (-2, 1.6, 4.0)]


def ln_q(soc):
    return sum(nu * np.log(per * soc + a0) for nu, per, a0 in SPECIES)


TRUE = dict(e=1.316, n=0.95, soc0=0.18, c=10.0)
SOC = np.array([0.18, 0.27, 0.36, 0.45, 0.55, 0.64, 0.73, 0.82, 0.76, 0.61, 0.47, 0.33])
T = np.array([296.4, 297.8, 299.1, 300.5, 301.2, 302.8, 303.9, 305.1, 304.0, 301.9, 299.7, 297.3])
NOISE = np.array([0.002475, -0.002339, -0.001831, 0.001031, -0.000552, 0.000862,
                  0.001522, -0.001306, 0.002253, 0.000625, -0.002153, 0.000351])
Q_AH = (SOC - TRUE["soc0"]) * TRUE["c"]


def model(x, e, n, soc0):
    q, temp = x
    soc = soc0 + q / TRUE["c"]
    return e + DE_DT * (temp - T_REF) - R * temp / (n * F) * ln_q(soc)


E_TRUE = model((Q_AH, T), TRUE["e"], TRUE["n"], TRUE["soc0"])
V = np.round(E_TRUE + NOISE, 6)
print("volts =", [f"{v:.6f}" for v in V])
p, cov = curve_fit(model, (Q_AH, T), V, p0=[1.246, 1.0, 0.15], method="lm", xtol=1e-15, ftol=1e-15)
sig = np.sqrt(np.diag(cov))
for name, v, s in zip(["e_formal_298_v", "n_apparent", "soc_at_first_rest"], p, sig):
    print(f"{name} = {v:.10f} +- {s:.10f}")
res = V - model((Q_AH, T), *p)
print(f"residual rms = {np.sqrt(np.mean(res**2)):.10e} V")
print("t 0.975:", [float(round(student_t.ppf(0.975, d), 3)) for d in range(1, 31)])
