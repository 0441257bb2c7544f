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

impl Estimator {
    /// The expanded relative uncertainty of the model's rate from the
    /// instruments and the density, by first-order propagation through the
    /// flow equations (GUM 5.1.2), the causes taken as independent.
    ///
    /// Liquid: m = k √(2 ρ ΔP), ΔP = p + ρ g (h − z), so
    /// ∂ln m/∂h = ρ g / (2 ΔP), ∂ln m/∂p = 1 / (2 ΔP) and
    /// ∂ln m/∂ln ρ = 1/2 + ρ g (h − z) / (2 ΔP).
    /// Vapour: m ∝ p_upstream (choked, and nearly so below), so
    /// ∂ln m/∂p = 1 / p_upstream.
    pub(super) fn rate_fraction(&self, r: &Reading, unit: &Outflow) -> f64 {
        let u_level = rectangular(self.tank.level.accuracy.bound);
        let u_pressure = self
            .tank
            .pressure
            .as_ref()
            .map_or(0.0, |p| rectangular(p.sensor.accuracy.bound));
        let u_density = rectangular(self.tank.density_uncertainty.bound);
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
            Phase::Vapour(_) => {
                let upstream = self.vessel.ambient().si() + r.state.headspace.si();
                u_pressure / upstream.max(1.0)
            }
            Phase::None => 0.0,
        };
        (COVERAGE_FACTOR * relative).min(0.9)
    }

    /// The inventory balance's uncertainty at this sample, by cause;
    /// `smoothing` is the share of one reading's noise left on the present
    /// level (1 for a single reading).
    pub(super) fn inventory_causes(
        &self,
        r: &Reading,
        inventory: f64,
        smoothing: f64,
    ) -> BandCauses {
        let start = self.start.expect("set by begin");
        let rho = r.density;
        let area_now = self.vessel.geometry().area_si(r.state.level.si());
        let k = COVERAGE_FACTOR;
        // A data sheet's accuracy bounds each reading, not the difference
        // of two: nonlinearity and drift need not cancel between the start
        // and now, so the two ends count as independent (conservative).
        let u_level = rectangular(self.tank.level.accuracy.bound);
        let level_accuracy = k * rho * quad(start.area, area_now) * u_level;
        // The start level is interpolated from readings either side, and
        // the present one is one reading.
        let noise = self.level_noise();
        let level_noise = k * rho * quad(start.area * noise, area_now * noise * smoothing);
        let density = k * inventory.abs() * rectangular(self.tank.density_uncertainty.bound);
        let transfer = self.tank.transfer.as_ref().map_or(0.0, |meter| {
            k * self.transferred_magnitude.total() * rectangular(meter.accuracy.of(1.0))
        });
        // A temperature error shifts the density at both ends alike, so it
        // acts on the mass that left, through the expansion coefficient.
        let temperature = match (&self.tank.temperature, r.temperature) {
            (Some(sensor), Some(t)) if self.tank.density.follows_temperature() => {
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
                k * inventory.abs() * per_kelvin * rectangular(sensor.accuracy.bound)
            }
            _ => 0.0,
        };
        let combined = [level_accuracy, level_noise, density, transfer, temperature]
            .iter()
            .map(|c| c * c)
            .sum::<f64>()
            .sqrt();
        BandCauses {
            cd_low: self.cd_band.0,
            cd_high: self.cd_band.1,
            level_accuracy_kg: level_accuracy,
            level_noise_kg: level_noise,
            density_kg: density,
            transfer_kg: transfer,
            temperature_kg: temperature,
            inventory_kg: combined,
            rate_fraction: 0.0,
            fit_fraction: None,
            model_low_kg: 0.0,
            model_high_kg: 0.0,
            bridge_kg: 0.0,
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
