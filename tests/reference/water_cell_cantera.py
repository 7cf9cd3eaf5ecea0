"""Check values for src/electrochem/hydrogen.rs, computed with Cantera 3.2
(pip install cantera iapws). Not run by CI: the numbers it prints are the
ones written beside the Rust tests.

Gas species from gri30.yaml (reference pressure 1 atm); liquid water from
Cantera's real-water model (ct.Water) for the saturation pressure and the
latent heat; IAPWS-IF97 saturation pressure from the iapws package.
"""
import math

import cantera as ct
from iapws import IAPWS97

F = ct.faraday / 1000  # C/mol
R = ct.gas_constant / 1000  # J/(mol K)
gas = ct.Solution("gri30.yaml")
water = ct.Water()


def standard(species, temp_k):
    gas.TPX = temp_k, ct.one_atm, {species: 1}
    i = gas.species_index(species)
    return (gas.standard_gibbs_RT[i] * R * temp_k, gas.standard_enthalpies_RT[i] * R * temp_k)


for temp_c in (25, 60, 80):
    t = temp_c + 273.15
    g_h2, h_h2 = standard("H2", t)
    g_o2, h_o2 = standard("O2", t)
    g_w, h_w = standard("H2O", t)
    water.TQ = t, 0.0
    p_sat = water.P
    h_liq = water.enthalpy_mole / 1000
    water.TQ = t, 1.0
    h_vap = water.enthalpy_mole / 1000
    dg_gas = g_w - g_h2 - 0.5 * g_o2
    dh_gas = h_w - h_h2 - 0.5 * h_o2
    dh_liq = dh_gas - (h_vap - h_liq)
    dg_liq = dg_gas + R * t * math.log(p_sat / gas.reference_pressure)
    e_dry = -dg_liq / (2 * F)
    p_gas = (ct.one_atm - p_sat) / gas.reference_pressure
    e_sat = e_dry + R * t / (2 * F) * math.log(p_gas**1.5)
    print(
        f"{temp_c} C: E_rev dry 1 atm {e_dry:.4f} V, saturated 1 atm {e_sat:.4f} V, "
        f"E_tn HHV {-dh_liq / (2 * F):.4f} V, LHV {-dh_gas / (2 * F):.4f} V, "
        f"p_sat IF97 {IAPWS97(T=t, x=0).P * 10:.6f} bar"
    )
