//! What widens the band: the instruments' and the density's share of the
//! model's rate, and the inventory balance's uncertainty by cause, combined
//! by first-order propagation in quadrature (GUM 5.1) with each stated
//! accuracy read as the bound of a rectangular distribution (GUM 4.3.7).

use super::*;

/// The root sum of squares of two contributions: what `f64::hypot` gives,
/// without its guard against overflow, which figures of this size never
/// need and which costs more than the rest of a step's arithmetic.
pub(super) fn quad(a: f64, b: f64) -> f64 {
    (a * a + b * b).sqrt()
}

/// The standard uncertainty of a value known only to lie within ±bound:
/// bound / √3, the rectangular distribution of GUM 4.3.7.
pub(super) fn rectangular(bound: f64) -> f64 {
    bound / 3f64.sqrt()
}

/// The standard uncertainties of a tank's instruments and density, made
/// once per estimator: every sample uses them, and each is a division.
#[derive(Debug, Clone, Copy, Default)]
pub(super) struct Standard {
    pub(super) level: f64,
    pub(super) pressure: f64,
    pub(super) density: f64,
    /// The transfer meter's, per unit of flow magnitude.
    pub(super) meter: f64,
    pub(super) temperature: f64,
    /// The level register's quantisation (step / √12): the level noise is
    /// never taken below it.
    pub(super) level_quantisation: f64,
    /// The same of the pressure register, for the pressure's noise.
    pub(super) pressure_quantisation: f64,
}

impl Standard {
    pub(super) fn of(tank: &Tank) -> Self {
        Self {
            level: rectangular(tank.level.accuracy.bound),
            pressure: tank
                .pressure
                .as_ref()
                .map_or(0.0, |p| rectangular(p.sensor.accuracy.bound)),
            density: rectangular(tank.density_uncertainty.bound),
            meter: tank
                .transfer
                .as_ref()
                .map_or(0.0, |meter| rectangular(meter.accuracy.of(1.0))),
            temperature: tank
                .temperature
                .as_ref()
                .map_or(0.0, |sensor| rectangular(sensor.accuracy.bound)),
            level_quantisation: tank.level.resolution_si() / 12f64.sqrt(),
            pressure_quantisation: tank
                .pressure
                .as_ref()
                .map_or(0.0, |p| p.sensor.resolution_si() / 12f64.sqrt()),
        }
    }
}

/// A reading's noise from its second differences: white noise of standard
/// deviation s gives second differences of variance 6 s² (a slow, smooth
/// signal adds little to them).
#[derive(Debug, Clone, Copy, Default)]
pub(super) struct NoiseMeter {
    mean_square: f64,
    count: u64,
    previous: [Option<f64>; 2],
}

impl NoiseMeter {
    /// Notes a reading; true when it made a second difference (from the
    /// third reading on).
    pub(super) fn note(&mut self, value: f64) -> bool {
        let made = if let [Some(a), Some(b)] = self.previous {
            let d2 = value - 2.0 * b + a;
            self.count += 1;
            self.mean_square += (d2 * d2 - self.mean_square) / self.count as f64;
            true
        } else {
            false
        };
        self.previous = [self.previous[1], Some(value)];
        made
    }

    /// The noise's standard deviation, zero until three readings came.
    pub(super) fn standard_deviation(&self) -> f64 {
        (self.mean_square / 6.0).sqrt()
    }

    /// The same, never below `floor` until ten second differences have
    /// been seen: the first few say little about the noise.
    pub(super) fn standard_deviation_at_least(&self, floor: f64) -> f64 {
        let measured = self.standard_deviation();
        if self.count < 10 {
            measured.max(floor)
        } else {
            measured
        }
    }
}

/// A headspace gauge pressure within this many standard deviations of its
/// noise is not told from ambient: the 3σ detection limit of analytical
/// chemistry (IUPAC, Currie 1995; common practice). Below it the best
/// vapour flow is none, since the square root of the noise's positive half
/// would otherwise count as a steady flow for as long as the event stays
/// open; the band keeps what the gauge cannot rule out.
pub const PRESSURE_DETECTION_MULTIPLE: f64 = 3.0;

/// The inventory balance's uncertainty at one sample by cause, each
/// expanded and squared (kg²).
#[derive(Debug, Clone, Copy, Default)]
pub(super) struct InventorySquares {
    level_accuracy: f64,
    level_noise: f64,
    density: f64,
    transfer: f64,
    temperature: f64,
}

impl InventorySquares {
    /// All the causes combined, root sum of squares (kg).
    pub(super) fn combined(&self) -> f64 {
        (self.level_accuracy + self.level_noise + self.density + self.transfer + self.temperature)
            .sqrt()
    }

    /// Writes each cause (kg) and the combined figure into the band.
    pub(super) fn write_causes(&self, band: &mut BandCauses) {
        band.level_accuracy_kg = self.level_accuracy.sqrt();
        band.level_noise_kg = self.level_noise.sqrt();
        band.density_kg = self.density.sqrt();
        band.transfer_kg = self.transfer.sqrt();
        band.temperature_kg = self.temperature.sqrt();
        band.inventory_kg = self.combined();
    }
}

impl Estimator {
    /// The expanded relative uncertainty of the model's rate from the
    /// instruments and the density, by first-order propagation through the
    /// flow equations (GUM 5.1.2), the causes taken as independent.
    ///
    /// Liquid: m = k √(2 ρ ΔP), ΔP = p + ρ g (h − z), so
    /// ∂ln m/∂h = ρ g / (2 ΔP), ∂ln m/∂p = 1 / (2 ΔP) and
    /// ∂ln m/∂ln ρ = 1/2 + ρ g (h − z) / (2 ΔP).
    /// (Vapour is not linear enough near ambient for a derivative: see
    /// [`Estimator::unit_rates`].)
    fn liquid_rate_fraction(&self, r: &Reading, unit: &Outflow) -> f64 {
        let Standard {
            level: u_level,
            pressure: u_pressure,
            density: u_density,
            ..
        } = self.standard;
        let relative = match unit.phase {
            Phase::Liquid => {
                let driving = unit.driving.si().max(1.0);
                let head = r.density
                    * STANDARD_GRAVITY
                    * (r.state.level.si() - self.params.hole_height_m).max(0.0);
                let half_over = 0.5 / driving;
                let level_term = r.density * STANDARD_GRAVITY * u_level * half_over;
                let pressure_term = u_pressure * half_over;
                let density_term = u_density * (0.5 + head * half_over);
                (level_term * level_term
                    + pressure_term * pressure_term
                    + density_term * density_term)
                    .sqrt()
            }
            Phase::Vapour(_) | Phase::None => 0.0,
        };
        (COVERAGE_FACTOR * relative).min(0.9)
    }

    /// The flow through the unit hole at this sample, at the best values
    /// and at the ends of the instruments' accuracy; `unit`'s rate becomes
    /// zero where the gauge cannot tell the headspace from ambient (its
    /// phase stays vapour: the hole is still in the gas space, and the
    /// level cannot check what the band allows through it).
    ///
    /// Liquid: the rate's band by first-order propagation
    /// (`liquid_rate_fraction`). Vapour: the flow at the gauge pressure
    /// less and plus its expanded uncertainty (the transmitter's accuracy
    /// and the reading's noise in quadrature). Near ambient the subcritical
    /// flow goes as √Δp, so a derivative (choked: ∂ln m/∂p = 1/p_upstream)
    /// would understate the band by orders of magnitude just where the
    /// blowdown ends.
    pub(super) fn unit_rates(&self, r: &Reading, unit: &mut Outflow) -> UnitRates {
        let in_gas_space = unit.phase != Phase::Liquid
            && self.vessel.vapour().is_some()
            && r.state.level.si() <= self.params.hole_height_m;
        if !in_gas_space {
            return UnitRates::relative(unit.rate.si(), self.liquid_rate_fraction(r, unit));
        }
        // A gauge at or below ambient: no outflow at the reading, but the
        // hole is in the gas space and the band still allows some.
        if unit.phase == Phase::None {
            unit.phase = Phase::Vapour(crate::model::GasRegime::Subcritical);
        }
        // Until the noise is known, the transmitter's accuracy stands in.
        let noise = self
            .pressure_noise
            .standard_deviation_at_least(self.standard.pressure)
            .max(self.standard.pressure_quantisation);
        let spread = COVERAGE_FACTOR * quad(self.standard.pressure, noise);
        let gauge = r.state.headspace.si();
        let at = |headspace: f64| {
            let state = TankState {
                headspace: Pressure::pascals(headspace),
                ..r.state
            };
            self.unit_outflow_in(&state, r).rate.si()
        };
        let low = at((gauge - spread).max(0.0));
        let high = at(gauge + spread);
        if gauge <= PRESSURE_DETECTION_MULTIPLE * noise {
            unit.rate = MassRate::ZERO;
            return UnitRates {
                best: 0.0,
                low: 0.0,
                high,
            };
        }
        UnitRates {
            best: unit.rate.si(),
            low: low.min(unit.rate.si()),
            high: high.max(unit.rate.si()),
        }
    }

    /// The inventory balance's uncertainty at this sample, by cause, each
    /// squared: their sum's square root is the combined figure every
    /// sample needs, and the causes themselves are wanted only when the
    /// whole estimate is (`InventorySquares::write_causes`).
    pub(super) fn inventory_squares(&self, r: &Reading, inventory: f64) -> InventorySquares {
        let start = self.start.expect("set by begin");
        let rho = r.density;
        let area_now = self.vessel.geometry().area_si(r.state.level.si());
        let areas = start.area * start.area + area_now * area_now;
        let k = COVERAGE_FACTOR;
        // A data sheet's accuracy bounds each reading, not the difference
        // of two: nonlinearity and drift need not cancel between the start
        // and now, so the two ends count as independent (conservative).
        let per_area = k * rho * self.standard.level;
        // The start level is interpolated from readings either side, and
        // the present one is one reading; both carry the level's noise.
        let per_area_noise = k * rho * self.level_noise();
        let density = k * inventory.abs() * self.standard.density;
        let transfer = if self.tank.transfer.is_some() {
            k * self.transferred_magnitude.total() * self.standard.meter
        } else {
            0.0
        };
        // A temperature error shifts the density at both ends alike, so it
        // acts on the mass that left, through the expansion coefficient.
        let temperature = match (&self.tank.temperature, r.temperature) {
            (Some(_), Some(t)) if self.tank.density.follows_temperature() => {
                let rho_up = self
                    .tank
                    .density
                    .at(Some(Temperature::kelvin(t + 1.0)))
                    .si();
                let rho_down = self
                    .tank
                    .density
                    .at(Some(Temperature::kelvin(t - 1.0)))
                    .si();
                let per_kelvin = ((rho_down - rho_up) / 2.0 / rho).abs();
                k * inventory.abs() * per_kelvin * self.standard.temperature
            }
            _ => 0.0,
        };
        InventorySquares {
            level_accuracy: per_area * per_area * areas,
            level_noise: per_area_noise * per_area_noise * areas,
            density: density * density,
            transfer: transfer * transfer,
            temperature: temperature * temperature,
        }
    }

    pub(super) fn with_defaults_noted(mut self) -> Self {
        self.default_accuracies = self.tank_uses_default_accuracies();
        self.noise = self.measure_noise();
        self
    }

    /// Whether any of the tank's instrument accuracies (or its density's
    /// uncertainty) is a default rather than the config's own figure.
    pub(super) fn tank_uses_default_accuracies(&self) -> bool {
        let t = &self.tank;
        !t.level.accuracy.stated
            || t.pressure
                .as_ref()
                .is_some_and(|p| !p.sensor.accuracy.stated)
            || t.transfer.as_ref().is_some_and(|s| !s.accuracy.stated)
            || t.temperature.as_ref().is_some_and(|s| !s.accuracy.stated)
            || !t.density_uncertainty.stated
    }
}
