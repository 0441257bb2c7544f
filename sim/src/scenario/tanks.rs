//! A tank's `[[tank]]` entry: where it starts (level, headspace, liquid
//! temperature), its gauges' noise, offsets and drift, and its ullage, held
//! at a set point or a gas space of the site config's vapour with an
//! optional blanket supply (`ullage`, `ullage_thermal`, `blanket_max_kg_s`,
//! `blanket_max_nm3_h`); validated into a [`TankSetup`] in SI units.
//!
//! Also which site tank a scenario's tank id names (`tank_index`), which the
//! event checks use too.
//!
//! Left out: the scripted events (`events`, `faults`), and the gas space's
//! physics beyond its parameters (`physics`).

use super::Checker;
use super::raw::{RawTank, ThermalKind, UllageKind};
use crate::physics::{self, Gas, Thermal, UllageSpec};
use std::ops::Range;
use toml::Spanned;

/// A tank's starting state and sensor noise.
#[derive(Debug, Clone, PartialEq)]
pub struct TankSetup {
    pub initial_level_m: f64,
    /// Headspace gauge pressure, Pa: held constant for the whole run, or,
    /// with a gas space, its starting pressure and the blanket's set point.
    pub headspace_pa: f64,
    /// The gas space (`ullage = "gas"`): the site config's vapour, the
    /// thermal option, the ambient pressure and the blanket's largest
    /// supply. `None` for the held headspace, the default.
    pub ullage: Option<UllageSpec>,
    /// Standard deviation of the noise on the level reading, m.
    pub level_noise_m: f64,
    /// Standard deviation of the noise on the pressure reading, Pa.
    pub pressure_noise_pa: f64,
    /// A level gauge's error that is not noise: a fixed offset (m) and a
    /// drift that grows with time (m per hour), as a real gauge's zero
    /// wanders; what the band's stated accuracy must cover.
    pub level_bias_m: f64,
    pub level_drift_m_per_h: f64,
    /// A pressure transmitter's fixed offset, Pa.
    pub pressure_bias_pa: f64,
    /// The liquid's temperature, K (what a temperature sensor shows).
    pub temperature_k: f64,
    /// Its daily swing, peak to peak, K, and the liquid's volumetric
    /// expansion coefficient, 1/K: the level rises and falls with the
    /// temperature though no mass comes or goes.
    pub temperature_swing_k: f64,
    pub expansion_per_k: f64,
}

/// The largest blanket supply a scenario may give, kg/s (3 600 t/h, far
/// past any blanketing regulator); a bigger figure is likely a unit slip.
const MAX_BLANKET_KG_S: f64 = 1000.0;

impl Checker<'_> {
    /// The site config's index of the tank `id` names; a problem at `id`
    /// when the site has no such tank.
    pub(super) fn tank_index(&mut self, id: &Spanned<String>) -> Option<usize> {
        let found = self.site.tanks.iter().position(|t| t.id == *id.get_ref());
        if found.is_none() {
            let known: Vec<&str> = self.site.tanks.iter().map(|t| t.id.as_str()).collect();
            self.problem(
                id.span(),
                format!(
                    "tank \"{}\" is not in the site config; use one of: {}",
                    id.get_ref(),
                    known.join(", ")
                ),
            );
        }
        found
    }

    /// The tanks' setups in the site's order (all of them only when no
    /// problem was found); a problem for each entry that names no site
    /// tank or repeats one, and for each site tank without an entry (at
    /// `site_span`).
    pub(super) fn tanks(&mut self, raw: &[RawTank], site_span: Range<usize>) -> Vec<TankSetup> {
        let mut setups: Vec<Option<TankSetup>> = vec![None; self.site.tanks.len()];
        for t in raw {
            let Some(index) = self.tank_index(&t.id) else {
                continue;
            };
            if setups[index].is_some() {
                self.problem(
                    t.id.span(),
                    format!(
                        "tank \"{}\" has two [[tank]] entries; keep one",
                        t.id.get_ref()
                    ),
                );
                continue;
            }
            setups[index] = self.tank(t, index);
        }
        let mut out = Vec::with_capacity(setups.len());
        for (index, setup) in setups.into_iter().enumerate() {
            match setup {
                Some(s) => out.push(s),
                None => {
                    // Only complain about a missing entry when the tank was not
                    // listed at all; a listed tank already has its own message.
                    let id = &self.site.tanks[index].id;
                    if !raw.iter().any(|t| t.id.get_ref() == id) {
                        let message = format!(
                            "tank \"{id}\" of the site has no [[tank]] entry; add one with id = \"{id}\" and its initial_level_m"
                        );
                        self.problem(site_span.clone(), message);
                    }
                }
            }
        }
        out
    }

    fn tank(&mut self, t: &RawTank, index: usize) -> Option<TankSetup> {
        let tank = &self.site.tanks[index];
        let ctx = format!("tank \"{}\"", tank.id);
        let top = tank.vessel.geometry().height().si();
        let level = *t.initial_level_m.get_ref();
        let mut ok = true;
        if !(level.is_finite() && (0.0..=top).contains(&level)) {
            self.problem(
                t.initial_level_m.span(),
                format!("{ctx}: initial_level_m = {level} is outside the tank; give a level from 0 to {top} m"),
            );
            ok = false;
        }
        let ambient = self.site.ambient.si();
        let headspace_pa = match &t.headspace_kpa {
            None => tank.assumed_headspace.si(),
            Some(kpa) => {
                let pa = *kpa.get_ref() * 1000.0;
                if !pa.is_finite() || pa.abs() > 1e7 || pa + ambient <= 0.0 {
                    self.problem(
                        kpa.span(),
                        format!(
                            "{ctx}: headspace_kpa = {} is not a possible gauge pressure; give kPa above ambient, above -{} (0 for an open vent)",
                            kpa.get_ref(),
                            ambient / 1000.0
                        ),
                    );
                    ok = false;
                }
                pa
            }
        };
        let mut noise = |value: &Option<Spanned<f64>>, key: &str| match value {
            None => 0.0,
            Some(v) if v.get_ref().is_finite() && *v.get_ref() >= 0.0 => *v.get_ref(),
            Some(v) => {
                self.problem(
                    v.span(),
                    format!(
                        "{ctx}: {key} = {} must be a standard deviation, zero or more",
                        v.get_ref()
                    ),
                );
                ok = false;
                0.0
            }
        };
        let level_noise_m = noise(&t.level_noise_m, "level_noise_m");
        let pressure_noise_pa = noise(&t.pressure_noise_pa, "pressure_noise_pa");
        // Offsets and drifts may have either sign, within sizes no working
        // gauge reaches: 1 m of level, 0.1 m/h, 100 kPa.
        let mut offset = |value: &Option<Spanned<f64>>, key: &str, limit: f64, unit: &str| {
            match value {
                None => 0.0,
                Some(v) if v.get_ref().is_finite() && v.get_ref().abs() <= limit => *v.get_ref(),
                Some(v) => {
                    self.problem(
                    v.span(),
                    format!("{ctx}: {key} = {} is outside ±{limit} {unit}; give the gauge's error in {unit}", v.get_ref()),
                );
                    ok = false;
                    0.0
                }
            }
        };
        let level_bias_m = offset(&t.level_bias_m, "level_bias_m", 1.0, "m");
        let level_drift_m_per_h = offset(&t.level_drift_m_per_h, "level_drift_m_per_h", 0.1, "m/h");
        let pressure_bias_pa = offset(&t.pressure_bias_pa, "pressure_bias_pa", 100_000.0, "Pa");
        if let (Some(p), None) = (&t.pressure_noise_pa, &tank.pressure) {
            self.problem(
                p.span(),
                format!("{ctx}: pressure_noise_pa needs a pressure sensor, and the site maps none for this tank; remove it"),
            );
            ok = false;
        }
        let temperature_c = match &t.temperature_c {
            Some(c) if !(c.get_ref().is_finite() && (-60.0..=300.0).contains(c.get_ref())) => {
                self.problem(
                    c.span(),
                    format!("{ctx}: temperature_c = {} is outside -60 to 300 °C; give the liquid's temperature in °C", c.get_ref()),
                );
                ok = false;
                15.0
            }
            Some(c) => *c.get_ref(),
            None => 15.0,
        };
        // A liquid tank's contents swing a few kelvin a day at most (the
        // air more); no liquid expands by more than 0.01 per kelvin.
        let mut bounded =
            |value: &Option<Spanned<f64>>, key: &str, limit: f64, what: &str| match value {
                None => 0.0,
                Some(v) if v.get_ref().is_finite() && (0.0..=limit).contains(v.get_ref()) => {
                    *v.get_ref()
                }
                Some(v) => {
                    self.problem(
                        v.span(),
                        format!(
                            "{ctx}: {key} = {} is outside 0 to {limit}; give {what}",
                            v.get_ref()
                        ),
                    );
                    ok = false;
                    0.0
                }
            };
        let temperature_swing_k = bounded(
            &t.temperature_swing_k,
            "temperature_swing_k",
            50.0,
            "the daily swing, peak to peak, in K",
        );
        let expansion_per_k = bounded(
            &t.expansion_per_k,
            "expansion_per_k",
            0.01,
            "the volumetric expansion coefficient in 1/K (diesel about 0.00083)",
        );
        let ullage = self.ullage(t, index, level, &mut ok);
        ok.then_some(TankSetup {
            initial_level_m: level,
            headspace_pa,
            ullage,
            level_noise_m,
            pressure_noise_pa,
            level_bias_m,
            level_drift_m_per_h,
            pressure_bias_pa,
            temperature_k: temperature_c + 273.15,
            temperature_swing_k,
            expansion_per_k,
        })
    }

    /// The gas space of `ullage = "gas"`, its thermal option and blanket,
    /// checked against the site config's vapour; `None` for a held
    /// headspace. Clears `ok` on a problem.
    fn ullage(
        &mut self,
        t: &RawTank,
        index: usize,
        level: f64,
        ok: &mut bool,
    ) -> Option<UllageSpec> {
        let tank = &self.site.tanks[index];
        let ctx = format!("tank \"{}\"", tank.id);
        let gas = matches!(
            t.ullage.as_ref().map(|u| *u.get_ref()),
            Some(UllageKind::Gas)
        );
        if !gas {
            // The gas-space keys mean nothing for a held headspace.
            let keys = [
                (
                    "ullage_thermal",
                    t.ullage_thermal.as_ref().map(Spanned::span),
                ),
                (
                    "blanket_max_kg_s",
                    t.blanket_max_kg_s.as_ref().map(Spanned::span),
                ),
                (
                    "blanket_max_nm3_h",
                    t.blanket_max_nm3_h.as_ref().map(Spanned::span),
                ),
            ];
            for (key, span) in keys {
                if let Some(span) = span {
                    self.problem(
                        span,
                        format!("{ctx}: {key} applies to a gas space only; add ullage = \"gas\" or remove it"),
                    );
                    *ok = false;
                }
            }
            return None;
        }
        let span = t.ullage.as_ref().map_or(0..0, Spanned::span);
        let Some(vapour) = tank.vessel.vapour() else {
            self.problem(
                span,
                format!(
                    "{ctx}: ullage = \"gas\" needs the gas's properties, and the site config gives no vapour for this tank; add vapour = {{ molar_mass_g_mol, heat_capacity_ratio, temperature_c }} to its substance, or leave the headspace held"
                ),
            );
            *ok = false;
            return None;
        };
        let top = tank.vessel.geometry().height().si();
        if level >= top {
            self.problem(
                span,
                format!("{ctx}: ullage = \"gas\" needs room for the gas, and initial_level_m = {level} fills the tank; start below {top} m"),
            );
            *ok = false;
        }
        let gas = Gas {
            molar_mass_kg_mol: vapour.molar_mass().si(),
            heat_capacity_ratio: vapour.heat_capacity_ratio(),
            temperature_k: vapour.temperature().si(),
        };
        let thermal = match t.ullage_thermal.as_ref().map(|u| *u.get_ref()) {
            None | Some(ThermalKind::Isothermal) => Thermal::Isothermal,
            Some(ThermalKind::Adiabatic) => Thermal::Adiabatic,
        };
        // A normal m³ of the gas weighs p_n M / (R T_n).
        let normal_density =
            gas.density(physics::NORMAL_PRESSURE_PA, physics::NORMAL_TEMPERATURE_K);
        let blanket = match (&t.blanket_max_kg_s, &t.blanket_max_nm3_h) {
            (None, None) => 0.0,
            (Some(_), Some(nm3)) => {
                self.problem(
                    nm3.span(),
                    format!("{ctx}: give the blanket's supply once, as blanket_max_kg_s or blanket_max_nm3_h"),
                );
                *ok = false;
                0.0
            }
            (Some(v), None) => self.blanket(v, 1.0, "blanket_max_kg_s", "kg/s", &ctx, ok),
            (None, Some(v)) => self.blanket(
                v,
                normal_density / 3600.0,
                "blanket_max_nm3_h",
                "Nm³/h",
                &ctx,
                ok,
            ),
        };
        Some(UllageSpec {
            gas,
            thermal,
            ambient_pa: self.site.ambient.si(),
            blanket_max_kg_s: blanket,
        })
    }

    /// A blanket's largest supply in kg/s, from `value` times `to_kg_s`.
    fn blanket(
        &mut self,
        value: &Spanned<f64>,
        to_kg_s: f64,
        key: &str,
        unit: &str,
        ctx: &str,
        ok: &mut bool,
    ) -> f64 {
        let v = *value.get_ref();
        let kg_s = v * to_kg_s;
        if v.is_finite() && v >= 0.0 && kg_s <= MAX_BLANKET_KG_S {
            kg_s
        } else {
            self.problem(
                value.span(),
                format!(
                    "{ctx}: {key} = {v} must be the regulator's largest supply in {unit}, 0 (none) up to {:.0} {unit}",
                    MAX_BLANKET_KG_S / to_kg_s
                ),
            );
            *ok = false;
            0.0
        }
    }
}

#[cfg(test)]
mod tests {
    use crate::physics::{self, Gas, Thermal};
    use crate::scenario::testing::{TANKS, messages, parse_here};

    #[test]
    fn an_unknown_tank_is_named_with_its_place_and_the_known_ids() {
        let text = TANKS.replace("id = \"FF-T20\"", "id = \"FF-T99\"");
        let msg = messages(&text);
        assert!(
            msg.contains("test.toml:12:6: tank \"FF-T99\" is not in the site config; use one of: FF-T12, FF-T14, FF-T20"),
            "{msg}"
        );
        // The site tank left without an entry is named too.
        assert!(
            msg.contains("tank \"FF-T20\" of the site has no [[tank]] entry"),
            "{msg}"
        );
    }

    #[test]
    fn a_level_outside_the_tank_is_refused_with_its_height() {
        let msg = messages(&TANKS.replace("initial_level_m = 4.2", "initial_level_m = 5.5"));
        assert!(
            msg.contains("initial_level_m = 5.5 is outside the tank; give a level from 0 to 5 m"),
            "{msg}"
        );
    }

    #[test]
    fn a_gas_space_loads_with_the_site_vapour_and_its_blanket() {
        let text = TANKS.replace(
            "headspace_kpa = 15.0\n",
            "headspace_kpa = 15.0\nullage = \"gas\"\nullage_thermal = \"adiabatic\"\nblanket_max_nm3_h = 36.0\n",
        );
        let s = parse_here(&text).unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(s.tanks[0].ullage, None, "held by default");
        let spec = s.tanks[1].ullage.expect("FF-T14 has a gas space");
        // The site config's vapour: nitrogen, 28.01 g/mol, k 1.40, 15 °C.
        assert_eq!(
            spec.gas,
            Gas {
                molar_mass_kg_mol: 0.028_01,
                heat_capacity_ratio: 1.4,
                temperature_k: 288.15,
            }
        );
        assert_eq!(
            (spec.thermal, spec.ambient_pa),
            (Thermal::Adiabatic, 101_325.0)
        );
        // 36 Nm³/h of nitrogen, at about 1.250 kg per normal m³: 12.5 g/s.
        let rho_n = 101_325.0 * 0.028_01 / (physics::GAS_CONSTANT * 273.15);
        assert!((spec.blanket_max_kg_s - 36.0 * rho_n / 3600.0).abs() < 1e-15);
        assert!((spec.blanket_max_kg_s - 0.0125).abs() < 1e-5);
        let text = TANKS.replace(
            "headspace_kpa = 15.0\n",
            "headspace_kpa = 15.0\nullage = \"gas\"\nblanket_max_kg_s = 0.02\n",
        );
        let spec = parse_here(&text).unwrap().tanks[1].ullage.unwrap();
        assert_eq!(
            (spec.thermal, spec.blanket_max_kg_s),
            (Thermal::Isothermal, 0.02)
        );
    }

    #[test]
    fn gas_space_mistakes_are_said() {
        let t12 = "initial_level_m = 4.2\n";
        let t14 = "headspace_kpa = 15.0\n";
        for (at, keys, expected) in [
            (
                t12,
                "ullage = \"gas\"\n",
                "test.toml:6:10: tank \"FF-T12\": ullage = \"gas\" needs the gas's properties, and the site config gives no vapour for this tank",
            ),
            (
                t12,
                "blanket_max_kg_s = 0.1\n",
                "tank \"FF-T12\": blanket_max_kg_s applies to a gas space only; add ullage = \"gas\" or remove it",
            ),
            (
                t14,
                "ullage = \"held\"\nullage_thermal = \"adiabatic\"\n",
                "tank \"FF-T14\": ullage_thermal applies to a gas space only",
            ),
            (
                t14,
                "ullage = \"gas\"\nblanket_max_kg_s = 0.1\nblanket_max_nm3_h = 5.0\n",
                "give the blanket's supply once, as blanket_max_kg_s or blanket_max_nm3_h",
            ),
            (
                t14,
                "ullage = \"gas\"\nblanket_max_kg_s = -1.0\n",
                "blanket_max_kg_s = -1 must be the regulator's largest supply in kg/s, 0 (none) up to 1000 kg/s",
            ),
            (t14, "ullage = \"vented\"\n", "unknown variant `vented`"),
        ] {
            let text = TANKS.replacen(at, &format!("{at}{keys}"), 1);
            let msg = messages(&text);
            assert!(msg.contains(expected), "{keys}\n=> {msg}");
        }
        let full = TANKS
            .replace("initial_level_m = 1.6", "initial_level_m = 2.5")
            .replace(t14, &format!("{t14}ullage = \"gas\"\n"));
        let msg = messages(&full);
        assert!(
            msg.contains(
                "ullage = \"gas\" needs room for the gas, and initial_level_m = 2.5 fills the tank"
            ),
            "{msg}"
        );
    }
}
