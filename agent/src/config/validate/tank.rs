//! Checking one `[[tank]]`: its id and device, its vessel and substance
//! (density, its temperature model and uncertainty, vapour, reportable
//! quantities), its headspace pressure, and the checks that need the tank
//! and its sensors together (a level range that fits the tank, a plausible
//! transfer range, a stuck check no shorter than two polls, where each
//! address is written for the overlap check).
//!
//! Left out: the shape's own checks (`geometry`) and one sensor's own
//! (`sensor`).

use super::{
    Checker, DEFAULT_LOSS_ALLOWANCE_MM_H, MAX_LEVEL_RATE_M_S, MAX_LOSS_ALLOWANCE_MM_H,
    MAX_REPORTABLE_KG, MAX_UNMETERED_TRANSFER_M3_S, shown,
};
use crate::config::raw::{self, RawSensor, RawTank};
use crate::config::types::{
    DEFAULT_DENSITY_UNCERTAINTY, Device, Flag, REFERENCE_TEMPERATURE_C, Role, Sensor, Tank,
    Uncertainty,
};
use crate::config::units::Quantity;
use crate::model::{
    AbsolutePressure, Density, DensityModel, GasProperties, Mass, MolarMass, Pressure, Temperature,
    Vessel,
};
use std::collections::HashMap;

impl Checker {
    pub(super) fn tank(
        &mut self,
        t: RawTank,
        devices: &HashMap<String, usize>,
        device_list: &[Device],
        ambient: AbsolutePressure,
    ) -> Option<Tank> {
        let id = t.id.get_ref().trim().to_owned();
        let ctx = format!("tank \"{id}\"");
        if id.is_empty() {
            self.problem(
                t.id.span(),
                "tank id is empty; use the tank's tag, such as \"T-101\"",
            );
        }
        let device = self.tank_device(&t, devices, &ctx);
        let density = Density::kg_per_cubic_metre(*t.substance.density_kg_m3.get_ref());
        let vessel = self.vessel(&t, &ctx, density, ambient);
        let reportable = self.reportable(&t.substance, &ctx);
        let assumed_headspace = self.assumed_headspace(&t, &ctx, ambient);
        let nominal_headspace = self.nominal_headspace(&t, &ctx, ambient);

        let height = vessel.as_ref().map(|v| v.geometry().height().si());
        let level = self.sensor(&t.level, &format!("{ctx} level"), Quantity::Length, density);
        let pressure = t
            .pressure
            .as_ref()
            .and_then(|p| self.pressure_sensor(p, &ctx, density, height));
        let transfer = t
            .transfer
            .as_ref()
            .and_then(|s| self.sensor(s, &format!("{ctx} transfer"), Quantity::Flow, density));
        let temperature = t.temperature.as_ref().and_then(|s| {
            self.sensor(
                s,
                &format!("{ctx} temperature"),
                Quantity::Temperature,
                density,
            )
        });
        self.pressure_keys_only_on_pressure(&t, &ctx);

        let density_model = self.density_model(&t.substance, &ctx, density);
        self.density_needs_temperature(&t, &ctx, &density_model);
        let density_uncertainty = self.density_uncertainty(&t.substance, &ctx);
        if let (Some(level), Some(height)) = (&level, height) {
            self.level_inside_tank(&t.level, level, &ctx, height);
        }
        if let Some(transfer) = &transfer {
            self.transfer_range(&t, transfer, &ctx);
        }
        let max_level_rate = self.max_level_rate(&t, &ctx);
        let suspected_loss = self.loss_watch(t.suspected_loss.as_ref(), &ctx);
        let loss_allowance_m_s = self.loss_allowance(&t, &ctx) / 3.6e6;
        if let Some(d) = device {
            self.stuck_after_poll(&t, &ctx, &device_list[d]);
        }
        self.note_addresses(&t, &id);
        let leak_flag = t.leak_flag.as_ref().map(|f| Flag {
            kind: f.input,
            address: *f.address.get_ref(),
        });

        Some(Tank {
            id,
            description: t.description,
            device: device?,
            vessel: vessel?,
            substance: t.substance.name,
            reportable,
            assumed_headspace,
            nominal_headspace,
            level: level?,
            pressure,
            transfer,
            temperature,
            leak_flag,
            density: density_model,
            density_uncertainty: density_uncertainty?,
            max_level_rate,
            suspected_loss,
            loss_allowance_m_s,
        })
    }

    /// `suspected_loss_allowance_mm_h`, mm/h.
    fn loss_allowance(&mut self, t: &RawTank, ctx: &str) -> f64 {
        let Some(v) = t.suspected_loss_allowance_mm_h.as_ref() else {
            return DEFAULT_LOSS_ALLOWANCE_MM_H;
        };
        let mm_h = *v.get_ref();
        if mm_h.is_finite() && (0.0..=MAX_LOSS_ALLOWANCE_MM_H).contains(&mm_h) {
            mm_h
        } else {
            self.problem(
                v.span(),
                format!(
                    "{ctx}: suspected_loss_allowance_mm_h = {} must be a level speed in mm/h, 0 to {MAX_LOSS_ALLOWANCE_MM_H}; leave it out for {DEFAULT_LOSS_ALLOWANCE_MM_H}",
                    shown(mm_h)
                ),
            );
            DEFAULT_LOSS_ALLOWANCE_MM_H
        }
    }

    /// The index of the device the tank names, which must be defined.
    fn tank_device(
        &mut self,
        t: &RawTank,
        devices: &HashMap<String, usize>,
        ctx: &str,
    ) -> Option<usize> {
        let device = devices.get(t.device.get_ref()).copied();
        if device.is_none() {
            let mut known: Vec<&str> = devices.keys().map(String::as_str).collect();
            known.sort();
            self.problem(
                t.device.span(),
                format!(
                    "{ctx}: device \"{}\" is not defined; define it in a [[device]] table or use one of: {}",
                    t.device.get_ref(),
                    if known.is_empty() { "(none defined)".to_owned() } else { known.join(", ") }
                ),
            );
        }
        device
    }

    /// The vessel: the shape with the liquid's density, the ambient
    /// pressure and the vapour, if the substance gives one.
    fn vessel(
        &mut self,
        t: &RawTank,
        ctx: &str,
        density: Density,
        ambient: AbsolutePressure,
    ) -> Option<Vessel> {
        let geometry = self.geometry(&t.geometry, ctx);
        let vapour = t.substance.vapour.as_ref().and_then(|v| {
            let raw = v.get_ref();
            let gas = GasProperties::new(
                MolarMass::g_per_mol(raw.molar_mass_g_mol),
                raw.heat_capacity_ratio,
                Temperature::celsius(raw.temperature_c),
            );
            self.model(v.span(), &format!("{ctx} vapour"), gas)
        });
        geometry.and_then(|g| {
            let v = Vessel::new(g, density, ambient, vapour);
            self.model(t.substance.density_kg_m3.span(), ctx, v)
        })
    }

    /// The reportable quantities, ascending; each a plausible mass.
    fn reportable(&mut self, substance: &raw::RawSubstance, ctx: &str) -> Vec<Mass> {
        let mut reportable = Vec::new();
        for q in &substance.reportable_kg {
            let kg = *q.get_ref();
            if kg.is_finite() && kg > 0.0 && kg <= MAX_REPORTABLE_KG {
                reportable.push(Mass::kilograms(kg));
            } else {
                self.problem(
                    q.span(),
                    format!(
                        "{ctx}: reportable quantity {} kg must be a positive number of kg, at most {} (a million tonnes)",
                        shown(kg),
                        shown(MAX_REPORTABLE_KG)
                    ),
                );
            }
        }
        reportable.sort_by(|a, b| a.si().total_cmp(&b.si()));
        reportable
    }

    /// `headspace_kpa`, the gauge pressure assumed without a pressure
    /// sensor (and refused beside one): an open vent's zero by default.
    fn assumed_headspace(&mut self, t: &RawTank, ctx: &str, ambient: AbsolutePressure) -> Pressure {
        let assumed = match &t.headspace_kpa {
            Some(kpa)
                if !kpa.get_ref().is_finite()
                    || kpa.get_ref().abs() > 10_000.0
                    || *kpa.get_ref() * 1000.0 < -ambient.si() =>
            {
                self.problem(
                    kpa.span(),
                    format!(
                        "{ctx}: headspace_kpa = {} is not a plausible gauge pressure; give kPa above ambient, from {:.3} (a full vacuum) to 10000 (0 for an open vent)",
                        shown(*kpa.get_ref()),
                        -ambient.si() / 1000.0
                    ),
                );
                Pressure::ZERO
            }
            Some(kpa) => Pressure::kilopascals(*kpa.get_ref()),
            None => Pressure::ZERO,
        };
        if let (Some(kpa), Some(_)) = (&t.headspace_kpa, &t.pressure) {
            self.problem(
                kpa.span(),
                format!("{ctx}: headspace_kpa is only for tanks without a pressure sensor; remove one of the two"),
            );
        }
        assumed
    }

    /// `nominal_headspace_kpa`, the blanket's usual gauge pressure: only
    /// beside a pressure sensor, and a plausible pressure.
    fn nominal_headspace(
        &mut self,
        t: &RawTank,
        ctx: &str,
        ambient: AbsolutePressure,
    ) -> Option<Pressure> {
        t.nominal_headspace_kpa.as_ref().map(|kpa| {
            let value = *kpa.get_ref();
            if t.pressure.is_none() {
                self.problem(kpa.span(), format!("{ctx}: nominal_headspace_kpa is for tanks with a pressure sensor; for a tank without one, give headspace_kpa"));
            } else if !(value.is_finite() && value > -ambient.si() / 1000.0 && value <= 10_000.0) {
                self.problem(kpa.span(), format!("{ctx}: nominal_headspace_kpa = {value} is not a plausible gauge pressure; give the blanket's usual pressure in kPa above ambient"));
            }
            Pressure::kilopascals(value)
        })
    }

    /// `reference` and `tap_elevation_m`, which only the pressure sensor
    /// takes.
    fn pressure_keys_only_on_pressure(&mut self, t: &RawTank, ctx: &str) {
        for (name, s) in [
            ("level", Some(&t.level)),
            ("transfer", t.transfer.as_ref()),
            ("temperature", t.temperature.as_ref()),
        ] {
            let Some(s) = s else { continue };
            if let Some(r) = &s.reference {
                self.problem(
                    r.span(),
                    format!(
                        "{ctx} {name}: reference applies only to the pressure sensor; remove it"
                    ),
                );
            }
            if let Some(z) = &s.tap_elevation_m {
                self.problem(
                    z.span(),
                    format!(
                        "{ctx} {name}: tap_elevation_m applies only to the pressure sensor; remove it"
                    ),
                );
            }
        }
    }

    /// A density that follows temperature needs a temperature to follow.
    fn density_needs_temperature(&mut self, t: &RawTank, ctx: &str, model: &DensityModel) {
        if model.follows_temperature() && t.temperature.is_none() {
            let span = t
                .substance
                .expansion_per_c
                .as_ref()
                .map(|s| s.span())
                .or_else(|| t.substance.density_table.as_ref().map(|s| s.span()))
                .unwrap_or(0..0);
            self.problem(
                span,
                format!("{ctx}: the density follows temperature, but the tank has no temperature sensor; add a temperature = {{ ... }} sensor, or remove the expansion data"),
            );
        }
    }

    /// `density_uncertainty_pct`, as a fraction, or the default.
    fn density_uncertainty(
        &mut self,
        substance: &raw::RawSubstance,
        ctx: &str,
    ) -> Option<Uncertainty> {
        match &substance.density_uncertainty_pct {
            Some(pct) if !(pct.get_ref().is_finite() && (0.0..=20.0).contains(pct.get_ref())) => {
                self.problem(
                    pct.span(),
                    format!("{ctx}: density_uncertainty_pct = {} is outside 0 to 20 %; give how far the density may be from the truth, in per cent (1 for a product known from its specification)", pct.get_ref()),
                );
                None
            }
            Some(pct) => Some(Uncertainty {
                bound: pct.get_ref() / 100.0,
                relative: true,
                stated: true,
            }),
            None => Some(Uncertainty {
                bound: DEFAULT_DENSITY_UNCERTAINTY,
                relative: true,
                stated: false,
            }),
        }
    }

    /// A transfer meter's range must be one a pump or pipeline can have:
    /// the estimator believes a transfer only up to this.
    fn transfer_range(&mut self, t: &RawTank, transfer: &Sensor, ctx: &str) {
        let (lo, hi) = transfer.valid_si;
        let top = MAX_UNMETERED_TRANSFER_M3_S;
        if lo.abs().max(hi.abs()) > top {
            let span = t.transfer.as_ref().map_or(0..0, |s| s.range.span());
            self.problem(
                span,
                format!(
                    "{ctx} transfer: range reaches {} m³/s, past any pump or pipeline ({top} m³/s is {} m³/h); check the range and its unit",
                    shown(lo.abs().max(hi.abs())),
                    top * 3600.0
                ),
            );
        }
    }

    /// Where each of the tank's values has its address written, so that an
    /// overlap found later is reported there.
    fn note_addresses(&mut self, t: &RawTank, id: &str) {
        let spans = [
            (Role::Level, Some(t.level.address.span())),
            (
                Role::Pressure,
                t.pressure.as_ref().map(|s| s.address.span()),
            ),
            (
                Role::Transfer,
                t.transfer.as_ref().map(|s| s.address.span()),
            ),
            (
                Role::Temperature,
                t.temperature.as_ref().map(|s| s.address.span()),
            ),
            (
                Role::LeakFlag,
                t.leak_flag.as_ref().map(|f| f.address.span()),
            ),
        ];
        for (role, span) in spans {
            if let Some(span) = span {
                self.address_spans.insert((id.to_owned(), role), span);
            }
        }
    }

    /// How the density follows temperature: an expansion coefficient at a
    /// reference temperature, a table, or neither (a constant).
    fn density_model(
        &mut self,
        substance: &raw::RawSubstance,
        ctx: &str,
        density: Density,
    ) -> DensityModel {
        let constant = DensityModel::Constant(density);
        match (&substance.expansion_per_c, &substance.density_table) {
            (Some(beta), Some(table)) => {
                self.problem(
                    table.span(),
                    format!("{ctx}: give either expansion_per_c or density_table, not both"),
                );
                let _ = beta;
                constant
            }
            (Some(beta), None) => {
                let at = substance
                    .reference_temperature_c
                    .as_ref()
                    .map_or(REFERENCE_TEMPERATURE_C, |t| *t.get_ref());
                let model =
                    DensityModel::expansion(density, Temperature::celsius(at), *beta.get_ref());
                self.model(beta.span(), &format!("{ctx} expansion_per_c"), model)
                    .unwrap_or(constant)
            }
            (None, Some(table)) => {
                if let Some(t) = &substance.reference_temperature_c {
                    self.problem(
                        t.span(),
                        format!("{ctx}: reference_temperature_c goes with expansion_per_c; a density_table carries its own temperatures, so remove it"),
                    );
                }
                let points = table
                    .get_ref()
                    .iter()
                    .map(|&(c, rho)| (Temperature::celsius(c), Density::kg_per_cubic_metre(rho)))
                    .collect();
                let model = DensityModel::table(points);
                self.model(table.span(), &format!("{ctx} density_table"), model)
                    .unwrap_or(constant)
            }
            (None, None) => {
                if let Some(t) = &substance.reference_temperature_c {
                    self.problem(
                        t.span(),
                        format!("{ctx}: reference_temperature_c needs expansion_per_c beside it; add the expansion coefficient or remove the key"),
                    );
                }
                constant
            }
        }
    }

    /// A level sensor's range must describe this tank: a span far past its
    /// top, or one that misses it, is a unit or scaling slip (mm taken for
    /// m, or a transmitter's factory range). Up to twice the tank's height
    /// is allowed, since a gauge is often ranged past the tank it sits on.
    fn level_inside_tank(&mut self, raw: &RawSensor, level: &Sensor, ctx: &str, height: f64) {
        let (lo, hi) = level.valid_si;
        let unit = &level.unit;
        let in_unit = |m: f64| shown(m / level.si_per_unit);
        if hi > 2.0 * height + 0.1 {
            self.problem(
                raw.range.span(),
                format!(
                    "{ctx} level: range reaches {} m, but the tank is only {} m tall; give the transmitter's span in {unit} (for this tank at most [{}, {}]), or check the unit",
                    shown(hi),
                    shown(height),
                    in_unit(lo.max(0.0)),
                    in_unit(height)
                ),
            );
        } else if lo < -height || lo >= height || hi <= 0.0 {
            self.problem(
                raw.range.span(),
                format!(
                    "{ctx} level: range {} to {} m does not cover the tank, which is {} m tall; levels are measured up from the tank's lowest inside point, so a range such as [0, {}] {unit} is expected",
                    shown(lo),
                    shown(hi),
                    shown(height),
                    in_unit(height)
                ),
            );
        }
    }

    /// `max_rate_m_s`, which only the level takes.
    fn max_level_rate(&mut self, t: &RawTank, ctx: &str) -> Option<f64> {
        for (name, s) in [
            ("pressure", t.pressure.as_ref()),
            ("transfer", t.transfer.as_ref()),
        ] {
            if let Some(rate) = s.and_then(|s| s.max_rate_m_s.as_ref()) {
                self.problem(
                    rate.span(),
                    format!(
                        "{ctx} {name}: max_rate_m_s applies only to the level sensor; remove it"
                    ),
                );
            }
        }
        let rate = t.level.max_rate_m_s.as_ref()?;
        let v = *rate.get_ref();
        if v.is_finite() && v > 0.0 && v <= MAX_LEVEL_RATE_M_S {
            Some(v)
        } else {
            self.problem(
                rate.span(),
                format!(
                    "{ctx} level: max_rate_m_s = {} must be a level speed in m/s, above 0 and at most {MAX_LEVEL_RATE_M_S}; leave it out to use the limit worked out from the tank",
                    shown(v)
                ),
            );
            None
        }
    }

    /// A stuck check shorter than two poll cycles would flag every reading
    /// of a quiet tank: the value has no chance to change between polls.
    /// The level, pressure and transfer are held to their device's polls.
    fn stuck_after_poll(&mut self, t: &RawTank, ctx: &str, device: &Device) {
        let sensors = [
            ("level", Some(&t.level)),
            ("pressure", t.pressure.as_ref()),
            ("transfer", t.transfer.as_ref()),
        ];
        let two_cycles = 2.0 * device.poll_interval.as_secs_f64();
        for (name, s) in sensors {
            let Some(secs) = s.and_then(|s| s.stuck_after_s.as_ref()) else {
                continue;
            };
            let v = *secs.get_ref();
            if v.is_finite() && v > 0.0 && v < two_cycles {
                self.problem(
                    secs.span(),
                    format!(
                        "{ctx} {name}: stuck_after_s = {} is shorter than two poll cycles of device \"{}\" ({} ms each), so a quiet reading would be flagged stuck; give at least {two_cycles} s (minutes suit most gauges)",
                        shown(v),
                        device.id,
                        device.poll_interval.as_millis()
                    ),
                );
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use crate::config::parse;
    use crate::config::tests::BASE;
    use crate::model::Pressure;
    use std::path::Path;

    /// `nominal_headspace_kpa`: only beside a pressure sensor, and a
    /// plausible gauge pressure.
    #[test]
    fn a_nominal_headspace_needs_a_pressure_sensor_and_a_plausible_value() {
        let pressure = "height_m = 5.0 }\npressure = { register = \"input\", address = 5, type = \"u16\", range = [0.0, 100.0], unit = \"kPa\", reference = \"gauge\" }";
        let with = |key: &str| BASE.replacen("height_m = 5.0 }", &format!("{pressure}\n{key}"), 1);
        let tank = parse(
            &with("nominal_headspace_kpa = 15.0"),
            Path::new("site.toml"),
        )
        .unwrap()
        .tanks
        .remove(0);
        assert_eq!(tank.nominal_headspace, Some(Pressure::kilopascals(15.0)));
        let cases = [
            (
                BASE.replacen(
                    "height_m = 5.0 }",
                    "height_m = 5.0 }\nnominal_headspace_kpa = 15.0",
                    1,
                ),
                "site.toml:10:25: tank \"T1\": nominal_headspace_kpa is for tanks with a pressure sensor; for a tank without one, give headspace_kpa",
            ),
            (
                with("nominal_headspace_kpa = -150.0"),
                "site.toml:11:25: tank \"T1\": nominal_headspace_kpa = -150 is not a plausible gauge pressure",
            ),
        ];
        for (text, expected) in cases {
            let err = parse(&text, Path::new("site.toml"))
                .unwrap_err()
                .to_string();
            assert!(
                err.starts_with(expected),
                "got:\n{err}\nexpected:\n{expected}"
            );
        }
        assert_eq!(
            parse(BASE, Path::new("site.toml")).unwrap().tanks[0].nominal_headspace,
            None
        );
    }
}
