"""Plate-cooling models: depth (m, positive down) and surface heat flow (mW m-2) from age (Myr).

Each model is a named instance carrying its published parameters and source; :data:`MODELS` is the
registry that ``[depth] models`` and ``agegrid models`` read. A new model is one new entry here.

Time conversion: 1 Myr = 1e6 Julian years of 365.25 days (:data:`SECONDS_PER_MYR`). Heat flow is
undefined at zero age (it grows as 1/sqrt(t)); ages below :data:`MIN_HEAT_FLOW_AGE_MYR` are clamped to
it, so heat flow is finite everywhere.
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

SECONDS_PER_MYR = 1e6 * 365.25 * 86400.0
#: Youngest age at which heat flow is evaluated (Myr); younger crust takes this age's value.
MIN_HEAT_FLOW_AGE_MYR = 0.1
#: 1 heat-flow unit (1 ucal cm-2 s-1) in mW m-2, with the thermochemical calorie of 4.184 J.
HFU_MW_M2 = 41.84


def _age(age) -> np.ndarray:
    age = np.asarray(age, dtype=float)
    return np.where(age >= 0, age, np.nan)


def _root_then_exponential(age, ridge, coefficient, switch, asymptote, amplitude, decay) -> np.ndarray:
    """The empirical depth form: ridge + coefficient sqrt(t) before ``switch``, asymptote - amplitude
    exp(-decay t) from there on; NaN for negative or missing ages."""
    from agegrid.cooling_law import two_branches

    return two_branches(age, 0.0, ridge, coefficient, False, switch, False, asymptote, -amplitude, decay)


def _inverse_root_then_exponential(age, coefficient, switch, asymptote, amplitude, decay, through_switch
                                   ) -> np.ndarray:
    """The empirical heat-flow form: coefficient / sqrt(t) before ``switch`` (and at it when
    ``through_switch``), asymptote + amplitude exp(-decay t) after; t clamped to MIN_HEAT_FLOW_AGE_MYR."""
    from agegrid.cooling_law import two_branches

    return two_branches(age, MIN_HEAT_FLOW_AGE_MYR, 0.0, coefficient, True, switch, through_switch, asymptote,
                        amplitude, decay)


@dataclass(frozen=True)
class CoolingModel:
    """Base of the cooling models: a name, a source and a table of parameters."""

    name: str = ""
    reference: str = ""
    description: str = ""

    @property
    def parameters(self) -> dict:
        skip = {"name", "reference", "description"}
        return {f.name: getattr(self, f.name) for f in dataclasses.fields(self) if f.name not in skip}

    def check_overrides(self, overrides: dict) -> None:
        """Raise ValueError naming any key that is not a parameter of this model."""
        unknown = sorted(set(overrides) - set(self.parameters))
        if unknown:
            raise ValueError(f"model {self.name!r} has no parameter(s) {', '.join(unknown)}; "
                             f"known: {', '.join(self.parameters)}")

    def with_parameters(self, **overrides) -> "CoolingModel":
        """A copy with some parameters replaced."""
        self.check_overrides(overrides)
        return dataclasses.replace(self, **overrides)

    def depth(self, age) -> np.ndarray:  # pragma: no cover - every model overrides it
        raise NotImplementedError

    def heat_flow(self, age) -> np.ndarray:  # pragma: no cover - every model overrides it
        raise NotImplementedError

    def isotherm_depth(self, age, temperature_c: float) -> np.ndarray:
        """Depth (m) of an isotherm below the sea floor; NaN when the model does not define it."""
        return np.full(np.shape(age), np.nan)

    def describe(self) -> dict:
        return {"name": self.name, "reference": self.reference, "description": self.description,
                "parameters": self.parameters}


@dataclass(frozen=True)
class HalfSpace(CoolingModel):
    """Half-space cooling (Turcotte & Schubert, Geodynamics, eqs. 4.125 and 4.209).

    d = d_r + 2 rho_m alpha (T_m - T_w) / (rho_m - rho_w) sqrt(kappa t / pi),
    q = k (T_m - T_0) / sqrt(pi kappa t).
    """

    ridge_depth_m: float = 2500.0
    mantle_temperature_c: float = 1300.0
    surface_temperature_c: float = 0.0
    thermal_expansion_per_k: float = 3e-5
    thermal_diffusivity_m2_s: float = 1e-6
    thermal_conductivity_w_m_k: float = 3.3
    mantle_density_kg_m3: float = 3300.0
    water_density_kg_m3: float = 1000.0

    def subsidence_coefficient(self) -> float:
        """Depth increase per sqrt(Myr) (m)."""
        drho = self.mantle_density_kg_m3 - self.water_density_kg_m3
        dt = self.mantle_temperature_c - self.surface_temperature_c
        return (2 * self.mantle_density_kg_m3 * self.thermal_expansion_per_k * dt / drho
                * np.sqrt(self.thermal_diffusivity_m2_s * SECONDS_PER_MYR / np.pi))

    def depth(self, age):
        return _root_then_exponential(age, self.ridge_depth_m, self.subsidence_coefficient(), np.inf, 0.0, 0.0, 0.0)

    def heat_flow(self, age):
        dt = self.mantle_temperature_c - self.surface_temperature_c
        per_root_myr = (1e3 * self.thermal_conductivity_w_m_k * dt
                        / np.sqrt(np.pi * self.thermal_diffusivity_m2_s * SECONDS_PER_MYR))
        return _inverse_root_then_exponential(age, per_root_myr, np.inf, 0.0, 0.0, 0.0, False)

    def isotherm_depth(self, age, temperature_c):
        from scipy.special import erfinv

        frac = (temperature_c - self.surface_temperature_c) / (self.mantle_temperature_c - self.surface_temperature_c)
        t = _age(age) * SECONDS_PER_MYR
        return 2 * np.sqrt(self.thermal_diffusivity_m2_s * t) * erfinv(np.clip(frac, 0, 1 - 1e-12))


@dataclass(frozen=True)
class PlateSeries(CoolingModel):
    """The plate model as its series solution (McKenzie 1967; Parsons & Sclater 1977).

    d = d_r + rho_m alpha T_m a / (2 (rho_m - rho_w)) [1 - 8/pi^2 sum_{n odd} n^-2 exp(-n^2 x)],
    q = k T_m / a [1 + 2 sum_{n>=1} exp(-n^2 x)],  x = pi^2 kappa t / a^2,  kappa = k / (rho_m c_p).

    Young ages use the Jacobi-transformed series (exact, fast to converge), old ages the direct one.
    Defaults are the GDH1 parameters of Stein & Stein (1992).
    """

    plate_thickness_km: float = 95.0
    basal_temperature_c: float = 1450.0
    thermal_expansion_per_k: float = 3.1e-5
    thermal_conductivity_w_m_k: float = 3.138
    heat_capacity_j_kg_k: float = 1171.0
    mantle_density_kg_m3: float = 3330.0
    water_density_kg_m3: float = 1000.0
    ridge_depth_m: float = 2600.0
    terms: int = 12

    @property
    def diffusivity(self) -> float:
        return self.thermal_conductivity_w_m_k / (self.mantle_density_kg_m3 * self.heat_capacity_j_kg_k)

    def _x(self, age) -> np.ndarray:
        a = self.plate_thickness_km * 1e3
        return np.pi**2 * self.diffusivity * np.asarray(age, float) * SECONDS_PER_MYR / a**2

    def asymptotic_subsidence(self) -> float:
        """Depth below the ridge of infinitely old sea floor (m)."""
        a = self.plate_thickness_km * 1e3
        return (self.mantle_density_kg_m3 * self.thermal_expansion_per_k * self.basal_temperature_c * a
                / (2 * (self.mantle_density_kg_m3 - self.water_density_kg_m3)))

    def depth(self, age):
        from scipy.special import erfc

        x = self._x(_age(age))
        small = x < 0.5
        xs, xl = np.where(small, x, 0.5), np.where(small, 1.0, x)
        # young: 8/pi^2 sum_odd (1 - e^{-n^2 x})/n^2 integrated from the Jacobi form of sum_odd e^{-n^2 x}
        root = np.sqrt(xs)
        young = 2 * root
        for m in range(1, self.terms):
            c = (m * np.pi / 2) ** 2
            young = young + 2 * (-1) ** m * (2 * root * np.exp(-c / np.maximum(xs, 1e-300))
                                            - 2 * np.sqrt(np.pi * c) * erfc(np.sqrt(c / np.maximum(xs, 1e-300))))
        young = young * 2 / np.pi**1.5
        n = 2 * np.arange(self.terms)[:, None] + 1
        old = 1 - 8 / np.pi**2 * np.sum(np.exp(-n**2 * xl.ravel()[None]) / n**2, axis=0).reshape(np.shape(xl))
        fraction = np.where(small, young, old)
        return self.ridge_depth_m + self.asymptotic_subsidence() * fraction

    def heat_flow(self, age):
        x = self._x(np.maximum(_age(age), MIN_HEAT_FLOW_AGE_MYR))
        a = self.plate_thickness_km * 1e3
        scale = 1e3 * self.thermal_conductivity_w_m_k * self.basal_temperature_c / a
        small = x < 1.0
        xs, xl = np.where(small, x, 1.0), np.where(small, 1.0, x)
        m = np.arange(1, self.terms)[:, None]
        young = np.sqrt(np.pi / xs) * (1 + 2 * np.sum(np.exp(-(m * np.pi) ** 2 / xs.ravel()[None]), axis=0)
                                       .reshape(np.shape(xs)))
        old = 1 + 2 * np.sum(np.exp(-m**2 * xl.ravel()[None]), axis=0).reshape(np.shape(xl))
        return scale * np.where(small, young, old)

    def temperature(self, depth_m, age) -> np.ndarray:
        """Temperature (C) at a depth below the sea floor (surface at 0 C)."""
        a = self.plate_thickness_km * 1e3
        z = np.clip(np.asarray(depth_m, float) / a, 0, 1)
        x = self._x(np.maximum(_age(age), 1e-6))
        n = np.arange(1, 200)[:, None]
        series = np.sum(np.sin(n * np.pi * z.ravel()[None]) * np.exp(-n**2 * np.ravel(x)[None]) / n, axis=0)
        return self.basal_temperature_c * (z + 2 / np.pi * series.reshape(np.shape(z)))

    def isotherm_depth(self, age, temperature_c):
        """Depth of an isotherm by bisection on the series temperature (60 halvings)."""
        age = np.broadcast_to(_age(age), np.shape(age)).astype(float)
        lo, hi = np.zeros_like(age), np.full_like(age, self.plate_thickness_km * 1e3)
        for _ in range(60):
            mid = 0.5 * (lo + hi)
            colder = self.temperature(mid, age) < temperature_c
            lo, hi = np.where(colder, mid, lo), np.where(colder, hi, mid)
        return np.where(np.isfinite(age), 0.5 * (lo + hi), np.nan)


@dataclass(frozen=True)
class ParsonsSclater(CoolingModel):
    """Parsons & Sclater (1977) empirical fits, J. Geophys. Res. 82, 803-827.

    Depth 2500 + 350 sqrt(t) below ``switch_age_myr``, 6400 - 3200 exp(-t/62.8) from there on; heat
    flow 11.3/sqrt(t) HFU (472.8/sqrt(t) mW m-2) below ``heat_flow_switch_age_myr``. Beyond that,
    agegrid continues heat flow with the plate form q_inf (1 + 2 exp(-t/62.8)), q_inf chosen so the
    curve is continuous (agegrid's continuation, not a published fit).
    """

    ridge_depth_m: float = 2500.0
    sqrt_coefficient_m: float = 350.0
    switch_age_myr: float = 70.0
    asymptotic_depth_m: float = 6400.0
    exponential_amplitude_m: float = 3200.0
    time_constant_myr: float = 62.8
    heat_flow_hfu: float = 11.3
    heat_flow_switch_age_myr: float = 120.0

    def depth(self, age):
        return _root_then_exponential(age, self.ridge_depth_m, self.sqrt_coefficient_m, self.switch_age_myr,
                                      self.asymptotic_depth_m, self.exponential_amplitude_m, 1 / self.time_constant_myr)

    def heat_flow(self, age):
        coefficient = self.heat_flow_hfu * HFU_MW_M2
        ts = self.heat_flow_switch_age_myr
        q_inf = coefficient / np.sqrt(ts) / (1 + 2 * np.exp(-ts / self.time_constant_myr))
        return _inverse_root_then_exponential(age, coefficient, ts, q_inf, 2 * q_inf, 1 / self.time_constant_myr,
                                              False)


@dataclass(frozen=True)
class SteinStein(CoolingModel):
    """GDH1, Stein & Stein (1992), Nature 359, 123-129: fits to the plate model.

    Depth 2600 + 365 sqrt(t) below 20 Myr, 5651 - 2473 exp(-0.0278 t) from 20 on; heat flow
    510/sqrt(t) up to 55 Myr, 48 + 96 exp(-0.0278 t) beyond. Its isotherms come from the plate
    series with the GDH1 parameters.
    """

    ridge_depth_m: float = 2600.0
    sqrt_coefficient_m: float = 365.0
    switch_age_myr: float = 20.0
    asymptotic_depth_m: float = 5651.0
    exponential_amplitude_m: float = 2473.0
    decay_per_myr: float = 0.0278
    heat_flow_young_coefficient: float = 510.0
    heat_flow_switch_age_myr: float = 55.0
    heat_flow_asymptote: float = 48.0
    heat_flow_amplitude: float = 96.0

    def depth(self, age):
        return _root_then_exponential(age, self.ridge_depth_m, self.sqrt_coefficient_m, self.switch_age_myr,
                                      self.asymptotic_depth_m, self.exponential_amplitude_m, self.decay_per_myr)

    def heat_flow(self, age):
        return _inverse_root_then_exponential(age, self.heat_flow_young_coefficient, self.heat_flow_switch_age_myr,
                                              self.heat_flow_asymptote, self.heat_flow_amplitude, self.decay_per_myr,
                                              True)

    def isotherm_depth(self, age, temperature_c):
        return PlateSeries().isotherm_depth(age, temperature_c)


MODELS: dict[str, CoolingModel] = {
    "hsc": HalfSpace(
        name="hsc", reference="Turcotte, D.L. & Schubert, G. (2014) Geodynamics, 3rd ed., Cambridge Univ. "
        "Press, sections 4.16 and 4.23", description="half-space cooling"),
    "ps77": ParsonsSclater(
        name="ps77", reference="Parsons, B. & Sclater, J.G. (1977) J. Geophys. Res. 82, 803-827",
        description="Parsons & Sclater (1977) empirical depth and heat-flow fits"),
    "gdh1": SteinStein(
        name="gdh1", reference="Stein, C.A. & Stein, S. (1992) Nature 359, 123-129",
        description="GDH1 plate-model fits"),
    "plate": PlateSeries(
        name="plate", reference="McKenzie, D.P. (1967) J. Geophys. Res. 72, 6261-6273; Parsons & Sclater "
        "(1977); default parameters of GDH1, Stein & Stein (1992)", description="general plate model, series solution"),
}


def get_model(name: str, overrides: dict | None = None) -> CoolingModel:
    """A registered model, with parameters overridden from ``[depth.parameters.<name>]``."""
    model = MODELS[name]
    return model.with_parameters(**overrides) if overrides else model
