//! Checking one sensor: its register type and word order, its unit, its
//! range and the raw values that scale to it (two numbers each, ones the
//! register can hold), its stuck check and its accuracy (a stated one in
//! the unit data sheets use, or the default for its kind); for a pressure
//! transmitter also its reference, its tap and a range a tank can have.
//!
//! Left out: the checks that need the tank as well (`tank`: a level range
//! that fits it, a stuck check against the device's poll interval).

use super::{Checker, MAX_PRESSURE_PA, MAX_STUCK_AFTER_S, shown};
use crate::config::raw::{RawPressureReference, RawSensor};
use crate::config::types::{
    DEFAULT_LEVEL_ACCURACY_FRACTION_OF_SPAN, DEFAULT_LEVEL_ACCURACY_MIN_M,
    DEFAULT_PRESSURE_ACCURACY_FRACTION_OF_SPAN, DEFAULT_PRESSURE_ACCURACY_MIN_PA,
    DEFAULT_TEMPERATURE_ACCURACY_K, DEFAULT_TRANSFER_ACCURACY, PressureSensor, Sensor, Uncertainty,
};
use crate::config::units::{Quantity, Unit};
use crate::model::{Density, Length, PressureTap};
use crate::registers::{DataType, WordOrder};
use std::ops::Range;
use std::time::Duration;
use toml::Spanned;

impl Checker {
    pub(super) fn sensor(
        &mut self,
        s: &RawSensor,
        ctx: &str,
        quantity: Quantity,
        density: Density,
    ) -> Option<Sensor> {
        let data_type = *s.data_type.get_ref();
        let word_order = self.word_order(s, ctx, data_type);
        let unit = self.unit(s, ctx, quantity);
        let stuck_after = self.stuck_after(s, ctx);
        let (e0, e1) = self.engineering_range(s, ctx)?;
        let raw_span = self.raw_span(s, ctx, data_type, (e0, e1))?;
        let unit = unit?;
        let si_per_unit = unit.si_factor(density);
        let si_offset = unit.si_offset();
        let valid = (e0 * si_per_unit + si_offset, e1 * si_per_unit + si_offset);
        let accuracy = self.accuracy(s, ctx, quantity, (valid.1 - valid.0).abs())?;
        Some(Sensor {
            register: s.register,
            address: *s.address.get_ref(),
            data_type,
            word_order,
            raw_span,
            engineering_span: (e0, e1),
            unit: s.unit.get_ref().clone(),
            si_per_unit,
            si_offset,
            valid_si: (valid.0.min(valid.1), valid.0.max(valid.1)),
            stuck_after,
            accuracy,
        })
    }

    /// `word_order`, which only a 32-bit type takes: high word first unless
    /// said.
    fn word_order(&mut self, s: &RawSensor, ctx: &str, data_type: DataType) -> WordOrder {
        match (&s.word_order, data_type.width()) {
            (Some(order), 1) => {
                self.problem(
                    order.span(),
                    format!(
                        "{ctx}: word_order applies only to 32-bit types (u32, i32, f32); remove it"
                    ),
                );
                WordOrder::default()
            }
            (Some(order), _) => *order.get_ref(),
            (None, _) => WordOrder::default(),
        }
    }

    /// The engineering unit, which must measure the sensor's quantity.
    fn unit(&mut self, s: &RawSensor, ctx: &str, quantity: Quantity) -> Option<Unit> {
        match Unit::parse(s.unit.get_ref()) {
            Some(u) if u.quantity() == quantity => Some(u),
            Some(_) | None => {
                self.problem(
                    s.unit.span(),
                    format!(
                        "{ctx}: unit \"{}\" is not a {} unit; use one of: {}",
                        s.unit.get_ref(),
                        quantity.name(),
                        Unit::names(quantity).join(", ")
                    ),
                );
                None
            }
        }
    }

    /// `stuck_after_s`: positive, and at most a week.
    fn stuck_after(&mut self, s: &RawSensor, ctx: &str) -> Option<Duration> {
        match &s.stuck_after_s {
            Some(secs) if (f64::MIN_POSITIVE..=MAX_STUCK_AFTER_S).contains(secs.get_ref()) => {
                Some(Duration::from_secs_f64(*secs.get_ref()))
            }
            Some(secs) => {
                self.problem(
                    secs.span(),
                    format!(
                        "{ctx}: stuck_after_s = {} must be a positive number of seconds, at most {MAX_STUCK_AFTER_S} (a week)",
                        shown(*secs.get_ref())
                    ),
                );
                None
            }
            None => None,
        }
    }

    /// `range`, in the engineering unit: two numbers, low then high (a
    /// range that is not, once said, is still returned for the checks
    /// that follow).
    fn engineering_range(&mut self, s: &RawSensor, ctx: &str) -> Option<(f64, f64)> {
        let (e0, e1) = self.pair(&s.range, ctx, "range", "low then high")?;
        if !(e0.is_finite() && e1.is_finite() && e1 > e0) {
            self.problem(
                s.range.span(),
                format!(
                    "{ctx}: range = [{}, {}] must be two finite numbers, low then high",
                    shown(e0),
                    shown(e1)
                ),
            );
        }
        Some((e0, e1))
    }

    /// The raw register values at the ends of the range: `raw`, two
    /// different numbers, or the range itself when the register holds the
    /// engineering value; either way, values the register type can hold.
    fn raw_span(
        &mut self,
        s: &RawSensor,
        ctx: &str,
        data_type: DataType,
        (e0, e1): (f64, f64),
    ) -> Option<(f64, f64)> {
        match &s.raw {
            Some(raw) => {
                let (r0, r1) = self.pair(
                    raw,
                    ctx,
                    "raw",
                    "the raw values at the low and high ends of range",
                )?;
                if !(r0.is_finite() && r1.is_finite() && r0 != r1) {
                    self.problem(
                        raw.span(),
                        format!(
                            "{ctx}: raw = [{}, {}] must be two different finite numbers",
                            shown(r0),
                            shown(r1)
                        ),
                    );
                } else {
                    self.raw_fits(raw.span(), ctx, data_type, (r0, r1), "raw");
                }
                Some((r0, r1))
            }
            // Unscaled: the register holds the engineering value itself, so
            // the range is what the register must be able to hold.
            None => {
                if e0.is_finite() && e1.is_finite() {
                    self.raw_fits(s.range.span(), ctx, data_type, (e0, e1), "range");
                }
                Some((e0, e1))
            }
        }
    }

    /// A two-number array such as `range` or `raw`: exactly two, since a
    /// third is a mistake worth saying (perhaps a missing key) rather than
    /// a number to drop.
    fn pair(
        &mut self,
        value: &Spanned<Vec<f64>>,
        ctx: &str,
        key: &str,
        meaning: &str,
    ) -> Option<(f64, f64)> {
        match value.get_ref().as_slice() {
            &[a, b] => Some((a, b)),
            other => {
                let listed: Vec<String> = other.iter().map(|&x| shown(x)).collect();
                self.problem(
                    value.span(),
                    format!(
                        "{ctx}: {key} = [{}] has {} number(s); give exactly two, {meaning}",
                        listed.join(", "),
                        other.len()
                    ),
                );
                None
            }
        }
    }

    /// Raw values must be ones the register type can hold: a u16 cannot
    /// read 70000, nor an unsigned type a negative count.
    fn raw_fits(
        &mut self,
        span: Range<usize>,
        ctx: &str,
        data_type: DataType,
        (r0, r1): (f64, f64),
        key: &str,
    ) {
        let (lo, hi, name) = match data_type {
            DataType::U16 => (0.0, f64::from(u16::MAX), "u16"),
            DataType::I16 => (f64::from(i16::MIN), f64::from(i16::MAX), "i16"),
            DataType::U32 => (0.0, f64::from(u32::MAX), "u32"),
            DataType::I32 => (f64::from(i32::MIN), f64::from(i32::MAX), "i32"),
            DataType::F32 => (-f64::from(f32::MAX), f64::from(f32::MAX), "f32"),
        };
        // The integer limits exactly, as a datasheet gives them.
        let limit = |x: f64| match data_type {
            DataType::F32 => shown(x),
            _ => format!("{x}"),
        };
        if r0.min(r1) < lo || r0.max(r1) > hi {
            let fix = if key == "range" {
                "add raw = [low, high] with the register's own values, or pick a type that holds these values"
            } else {
                "give the register's values at the ends of range, or pick a type that holds them"
            };
            self.problem(
                span,
                format!(
                    "{ctx}: {key} = [{}, {}] does not fit a {name} register, which holds {} to {}{}; {fix}",
                    shown(r0),
                    shown(r1),
                    limit(lo),
                    limit(hi),
                    if key == "range" { " (without raw, the register holds the range's values themselves)" } else { "" }
                ),
            );
        }
    }

    pub(super) fn pressure_sensor(
        &mut self,
        s: &RawSensor,
        ctx: &str,
        density: Density,
        height: Option<f64>,
    ) -> Option<PressureSensor> {
        let pctx = format!("{ctx} pressure");
        let absolute = self.pressure_reference(s, &pctx);
        let tap = self.pressure_tap(s, &pctx, height);
        let sensor = self.sensor(s, &pctx, Quantity::Pressure, density)?;
        self.pressure_range(s, &sensor, &pctx, absolute);
        Some(PressureSensor {
            sensor,
            absolute,
            tap,
        })
    }

    /// `reference`, which a pressure transmitter must give: whether it
    /// reads absolute (true) or gauge.
    fn pressure_reference(&mut self, s: &RawSensor, pctx: &str) -> bool {
        match &s.reference {
            Some(r) => *r.get_ref() == RawPressureReference::Absolute,
            None => {
                self.problem(
                    s.unit.span(),
                    format!("{pctx}: say whether the transmitter reads gauge or absolute: add reference = \"gauge\" or \"absolute\""),
                );
                false
            }
        }
    }

    /// Where the transmitter is: in the headspace unless `tap_elevation_m`
    /// puts it below the liquid, somewhere on the tank.
    fn pressure_tap(&mut self, s: &RawSensor, pctx: &str, height: Option<f64>) -> PressureTap {
        let Some(z) = &s.tap_elevation_m else {
            return PressureTap::Headspace;
        };
        let zv = *z.get_ref();
        if !zv.is_finite() || zv < 0.0 || height.is_some_and(|h| zv > h) {
            self.problem(
                z.span(),
                format!(
                    "{pctx}: tap_elevation_m = {zv} is not on the tank; give the tap's height above the tank bottom (0 to {} m), or leave it out for a headspace transmitter",
                    height.unwrap_or(f64::NAN)
                ),
            );
        }
        PressureTap::Submerged {
            elevation: Length::metres(zv),
        }
    }

    /// A range a tank can have: within 1000 bar, from a full vacuum up for
    /// an absolute transmitter, and not below a full vacuum for a gauge one.
    fn pressure_range(&mut self, s: &RawSensor, sensor: &Sensor, pctx: &str, absolute: bool) {
        let (lo, hi) = sensor.valid_si;
        let kpa = |pa: f64| shown(pa / 1000.0);
        if lo.abs().max(hi.abs()) > MAX_PRESSURE_PA {
            self.problem(
                s.range.span(),
                format!(
                    "{pctx}: range reaches {} kPa, past any tank ({} kPa, 1000 bar); check the range and its unit",
                    kpa(lo.abs().max(hi.abs())),
                    kpa(MAX_PRESSURE_PA)
                ),
            );
        } else if absolute && lo < 0.0 {
            self.problem(
                s.range.span(),
                format!(
                    "{pctx}: range starts at {} kPa, but an absolute transmitter reads from a full vacuum (0) up; start the range at 0 or above, or say reference = \"gauge\" if it reads relative to ambient",
                    kpa(lo)
                ),
            );
        } else if !absolute && lo < -crate::model::vessel::AMBIENT_RANGE.1 {
            self.problem(
                s.range.span(),
                format!(
                    "{pctx}: range starts at {} kPa gauge, below a full vacuum (about -101 kPa); check the range, or say reference = \"absolute\" if it reads from a vacuum",
                    kpa(lo)
                ),
            );
        }
    }

    /// The sensor's accuracy: its own key (one per kind of sensor, in the
    /// unit data sheets use), or the default for its kind.
    fn accuracy(
        &mut self,
        s: &RawSensor,
        ctx: &str,
        quantity: Quantity,
        span_si: f64,
    ) -> Option<Uncertainty> {
        // (key, its value, SI per unit of the key, relative, plausible max in the key's unit)
        let keys = [
            (
                "accuracy_mm",
                &s.accuracy_mm,
                Quantity::Length,
                0.001,
                false,
                1000.0,
            ),
            (
                "accuracy_kpa",
                &s.accuracy_kpa,
                Quantity::Pressure,
                1000.0,
                false,
                1000.0,
            ),
            (
                "accuracy_pct",
                &s.accuracy_pct,
                Quantity::Flow,
                0.01,
                true,
                50.0,
            ),
            (
                "accuracy_c",
                &s.accuracy_c,
                Quantity::Temperature,
                1.0,
                false,
                50.0,
            ),
        ];
        let mut found = None;
        let mut ok = true;
        for (key, value, for_quantity, factor, relative, max) in keys {
            let Some(value) = value else { continue };
            let v = *value.get_ref();
            if for_quantity != quantity {
                let right = keys.iter().find(|k| k.2 == quantity).map_or("", |k| k.0);
                self.problem(
                    value.span(),
                    format!("{ctx}: {key} is for a {} sensor; a {} sensor states its accuracy as {right}", for_quantity.name(), quantity.name()),
                );
                ok = false;
            } else if !(v.is_finite() && v > 0.0 && v <= max) {
                self.problem(
                    value.span(),
                    format!("{ctx}: {key} = {v} is outside (0, {max}]; give the accuracy from the instrument's data sheet"),
                );
                ok = false;
            } else {
                found = Some(Uncertainty {
                    bound: v * factor,
                    relative,
                    stated: true,
                });
            }
        }
        if !ok {
            return None;
        }
        Some(found.unwrap_or_else(|| default_accuracy(quantity, span_si)))
    }
}

/// The accuracy a sensor of `quantity` is taken to have when the config
/// states none, for a range `span_si` wide.
fn default_accuracy(quantity: Quantity, span_si: f64) -> Uncertainty {
    match quantity {
        Quantity::Length => Uncertainty {
            bound: (DEFAULT_LEVEL_ACCURACY_FRACTION_OF_SPAN * span_si)
                .max(DEFAULT_LEVEL_ACCURACY_MIN_M),
            relative: false,
            stated: false,
        },
        Quantity::Pressure => Uncertainty {
            bound: (DEFAULT_PRESSURE_ACCURACY_FRACTION_OF_SPAN * span_si)
                .max(DEFAULT_PRESSURE_ACCURACY_MIN_PA),
            relative: false,
            stated: false,
        },
        Quantity::Flow => Uncertainty {
            bound: DEFAULT_TRANSFER_ACCURACY,
            relative: true,
            stated: false,
        },
        Quantity::Temperature => Uncertainty {
            bound: DEFAULT_TEMPERATURE_ACCURACY_K,
            relative: false,
            stated: false,
        },
    }
}
