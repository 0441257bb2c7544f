//! The estimator of one leak event: three views of the release, one answer.
//!
//! 1. Orifice model: the rate from the live level and pressure at every
//!    sample, integrated by the trapezoid rule. It needs a hole size.
//! 2. Inventory balance: the liquid mass gone from the tank (at the density
//!    the liquid's temperature gives, where a sensor reads it), corrected
//!    for metered transfers. It needs no hole, and it is a measurement: the
//!    level gauge's accuracy bounds it.
//! 3. Fitted hole: the effective Cd·A that makes the orifice model's
//!    cumulative release match the inventory loss, by least squares with an
//!    intercept (the intercept absorbs the noise of the starting level). It
//!    is reported once the level has fallen several times its noise.
//!
//! The best estimate is the orifice model with the operator's hole when one
//! is given, else the fitted hole once the fit is ready, else the inventory
//! balance; and for liquid, whatever the model says is held to what the
//! level allows (the inventory balance and its band): a liquid cannot leave
//! a tank without the level showing it, so a hole size that the level
//! contradicts, a leak that stopped in a data gap, or a model run on against
//! a flat level cannot inflate the total. The estimate says which view it
//! follows and why.
//!
//! The band is built from its causes (see [`BandCauses`]): the Cd range as
//! a bound, and the instruments' accuracies, the level noise, the density
//! and the transfer meter combined by first-order propagation in
//! quadrature and expanded with a coverage factor of 2 (JCGM 100:2008,
//! the Guide to the expression of uncertainty in measurement, 5.1 and 6.2;
//! a data sheet's accuracy is read as the bound of a rectangular
//! distribution, GUM 4.3.7). The README sets the method out.
//!
//! The core is clock-free and deterministic: it sees timestamped samples
//! and nothing else, so replaying the logged samples of an event reproduces
//! the live figures exactly.
//!
//! A figure shown once is never lower later within one revision of the
//! parameters, except by a recorded reconciliation: when a gap ends and the
//! level on its far side shows less than was shown before it, the shown
//! totals come down to what the level allows, and the estimate counts it
//! (`quality.revisions_down`, warning `total_revised_down`). Otherwise the
//! best, low and high totals only ratchet up, because a fit that settles or
//! a noisy inventory must not make a running total fall before responders'
//! eyes. A revision (new parameters) starts afresh.

mod band;
mod figures;
pub mod fit;
mod forecast;
mod gaps;
mod start;
#[cfg(test)]
mod tests;

use band::quad;
use forecast::ForecastInput;

use crate::acquire::sample::TankSample;
use crate::config::Tank;
use crate::estimate::*;
use crate::model::MassRate;
use crate::model::blowdown::{Blowdown, BlowdownEnd, Thermal, Ullage, ullage_volume};
use crate::model::{
    Area, Density, DischargeCoefficient, Hole, Length, Mass, ModelResult, Outflow, Phase, Pressure,
    PressureReading, PressureTap, STANDARD_GRAVITY, TankState, Temperature, TimeSpan, Trapezoid,
    Vessel, forecast_liquid,
};
use fit::{LineFit, Window};

/// How often the forecast is recomputed, in sample time. A forecast is a
/// quadrature, far dearer than a sample step; every 10 s keeps a replay of a
/// day of 1 Hz samples well under a second. Deterministic, so replay
/// recomputes it at the same samples as the live run did.
pub const FORECAST_EVERY_MS: i64 = 10_000;

/// The fit is reported once the level has fallen this many times its noise.
pub const FIT_NOISE_MULTIPLE: f64 = 10.0;

/// Samples needed before a fit is reported, whatever the level drop.
pub const FIT_MIN_SAMPLES: u64 = 10;

/// A level that moves more than this many times the level noise from one
/// sample to the next is held back as a possible spike...
pub const SPIKE_NOISE_MULTIPLE: f64 = 50.0;
/// ...as is one that moves more than this, whatever the noise (m). No leak
/// this tool models drops a tank's level 5 cm between two polls.
pub const SPIKE_FLOOR_M: f64 = 0.05;

/// A given hole whose Cd·A differs from the fitted one by more than this
/// factor either way is flagged as inconsistent with the level drop.
pub const CONSISTENCY_RATIO: f64 = 1.5;

/// The window over which the inventory balance gives its own rate and its
/// smoothed value.
pub const INVENTORY_RATE_WINDOW_MS: i64 = 60_000;

/// The coverage factor of every band: two standard uncertainties, about
/// 95 % for a near-normal combination (GUM 6.2.2, 6.3.3).
pub const COVERAGE_FACTOR: f64 = 2.0;

/// Bridged gaps above this share of the total are said in every output.
pub const BRIDGED_SHARE_WARNING: f64 = 0.25;

/// The last usable state, for gaps and held readings.
#[derive(Debug, Clone, Copy)]
struct Last {
    at_ms: i64,
    state: TankState,
    inventory: f64,
}

/// The last good sample before the event's start, to interpolate the start.
#[derive(Debug, Clone, Copy)]
struct BeforeStart {
    at_ms: i64,
    level: f64,
    headspace: f64,
    temperature: Option<f64>,
}

/// Where the event began: its level, density and liquid mass.
#[derive(Debug, Clone, Copy)]
struct Start {
    level: f64,
    mass: f64,
    area: f64,
    /// Liquid mass above the hole at the start (kg), the most that can ever
    /// leave as liquid, transfers in aside.
    above_hole: f64,
}

/// The per-sample integrals per unit Cd·A: the rate through a 1 m² hole at
/// Cd 1, at the instruments' best values and at the low and high ends of
/// their accuracy. Every flow equation here is proportional to Cd·A, so
/// one integral serves the given, the fitted and the band figures.
#[derive(Debug, Clone, Default)]
struct PerUnitArea {
    /// The last point's time and its rates, in the order of `totals`.
    last: Option<(i64, [f64; 4])>,
    /// The trapezoid integrals of the rate (kg per m² of Cd·A): at the
    /// best values, its liquid part, and at the low and high ends. Four
    /// lanes of one time axis, so a sample is one pass over them.
    totals: [f64; 4],
}

impl PerUnitArea {
    const ALL: usize = 0;
    const LIQUID: usize = 1;
    const LOW: usize = 2;
    const HIGH: usize = 3;

    /// The rate at `at_ms` (times never go back: `push` is called only
    /// after the estimator has checked them), each lane by the trapezoid
    /// rule.
    fn push(&mut self, at_ms: i64, rate: UnitRates, liquid: bool) {
        let rates = [
            rate.best,
            if liquid { rate.best } else { 0.0 },
            rate.low,
            rate.high,
        ];
        if let Some((previous_ms, previous)) = self.last {
            // Half the interval in seconds, by a multiplication: a division
            // a lane would be the slowest arithmetic of the sample.
            let half_dt_s = (at_ms - previous_ms) as f64 * 0.0005;
            for ((total, before), now) in self.totals.iter_mut().zip(previous).zip(rates) {
                *total += (before + now) * half_dt_s;
            }
        }
        self.last = Some((at_ms, rates));
    }

    /// Adds a gap's bridge, integrated elsewhere: the level on the far
    /// side sees it, so the fit counts it.
    fn add_bridge(&mut self, amount: f64) {
        for total in &mut self.totals {
            *total += amount;
        }
    }

    /// Adds a lead-in before the first level, at one sample's rates for
    /// `seconds`: which the inventory cannot see, so the fit leaves it out.
    fn add_lead_in(&mut self, rate: UnitRates, seconds: f64) {
        self.totals[Self::ALL] += rate.best * seconds;
        self.totals[Self::LOW] += rate.low * seconds;
        self.totals[Self::HIGH] += rate.high * seconds;
    }

    /// Forgets the last point, so the next starts a new piece (a gap
    /// bridged some other way).
    fn break_here(&mut self) {
        self.last = None;
    }

    fn all(&self) -> f64 {
        self.totals[Self::ALL]
    }

    fn liquid(&self) -> f64 {
        self.totals[Self::LIQUID]
    }

    fn low(&self) -> f64 {
        self.totals[Self::LOW]
    }

    fn high(&self) -> f64 {
        self.totals[Self::HIGH]
    }
}

/// The flow through the unit hole (1 m² at Cd 1, kg/s) at one sample: at
/// the instruments' best values, and at the low and high ends of their
/// accuracy.
#[derive(Debug, Clone, Copy, Default)]
struct UnitRates {
    best: f64,
    low: f64,
    high: f64,
}

impl UnitRates {
    /// A band given as a fraction of the rate either way.
    fn relative(best: f64, fraction: f64) -> Self {
        Self {
            best,
            low: best * (1.0 - fraction).max(0.0),
            high: best * (1.0 + fraction),
        }
    }

    /// The band's half-width as a fraction of the best rate, for the
    /// account of the band (zero with no best rate).
    fn fraction(&self) -> f64 {
        if self.best > 0.0 {
            (self.high - self.low) / (2.0 * self.best)
        } else {
            0.0
        }
    }
}

/// The estimator of one event under one set of parameters.
#[derive(Debug, Clone)]
pub struct Estimator {
    tank: Tank,
    vessel: Vessel,
    params: LeakParams,
    cd: DischargeCoefficient,
    cd_band: (f64, f64),
    start_ms: i64,
    gap_limit_ms: i64,
    /// A hole of 1 m² at the leak's height: rates through it are rates per
    /// unit Cd·A.
    unit_hole: Hole,
    per_unit: PerUnitArea,
    /// Metered mass into the tank since the start (kg), and the same of the
    /// flow's magnitude (for the meter's uncertainty).
    transferred: Trapezoid,
    transferred_magnitude: Trapezoid,
    /// Mass bridged across gaps (kg), at the chosen figure.
    bridged_kg: f64,
    /// The uncertainty of bridges the level set (kg, expanded): it widens
    /// the model's band, whose Cd range cannot speak for them.
    bridge_uncertainty_kg: f64,
    before_start: Option<BeforeStart>,
    start: Option<Start>,
    /// Whether the start was bridged at the first sample's rate (a lead-in
    /// longer than the gap limit), and that lead-in per unit Cd·A: it
    /// counts among the bridged mass like any gap.
    start_bridged: bool,
    start_bridge_per_unit: f64,
    /// The lead-in before the first level, per unit Cd·A: counted by the
    /// model, invisible to the inventory balance, so the level bound allows
    /// for it.
    lead_in_per_unit: f64,
    fit: LineFit,
    /// The level's noise, from its second differences.
    level_noise_meter: band::NoiseMeter,
    /// The level noise, as `note_level` last found it.
    noise: f64,
    /// The headspace reading's noise, from its second differences: below
    /// a few times it, a gauge pressure is not told from ambient.
    pressure_noise: band::NoiseMeter,
    /// A level that jumped from the last one used, waiting for confirmation.
    pending_jump: Option<f64>,
    recent_inventory: Window,
    last: Option<Last>,
    last_transfer: f64,
    last_headspace: Option<Pressure>,
    last_temperature: Option<f64>,
    shown: (f64, f64, f64),
    /// The state the forecast is made from, picked by sample time (every
    /// FORECAST_EVERY_MS, and at once when its hole changes), and the
    /// forecast made from it once asked for.
    forecast_input: Option<ForecastInput>,
    /// (the input's time, the forecast made from it).
    forecast: Option<(i64, Option<ForecastSummary>)>,
    crossings: Vec<Crossing>,
    /// The latest sample's figures and what the whole estimate needs
    /// beyond them (see [`Estimator::estimate`]).
    latest: Option<figures::Latest>,
    quality: DataQuality,
    /// Whether the level has fallen beyond what the instruments allow, at
    /// any sample of this revision.
    loss_seen: bool,
    /// Whether the level has refuted the model's figure in this revision:
    /// from then on the figures follow the level.
    level_mode: bool,
    /// What the fit's band and the implied Cd rest on, at the latest sample.
    fit_inputs: figures::FitInputs,
    /// Whether any of the tank's accuracies is a default (see
    /// [`Estimator::tank_uses_default_accuracies`]).
    default_accuracies: bool,
    /// The given hole's area (m²), if a diameter was given: made once, as
    /// a branch. (Made every sample from the `Option`, the compiler
    /// multiplied the payload of a `None` too, and uninitialised bytes
    /// read as a subnormal number cost a microcode assist a sample.)
    area_given: Option<f64>,
    /// The instruments' standard uncertainties, made once.
    standard: band::Standard,
}

/// What one sample brings, converted.
struct Reading {
    at_ms: i64,
    state: TankState,
    density: f64,
    temperature: Option<f64>,
    /// Net transfer into the tank, m³/s.
    transfer: f64,
    held: Held,
}

#[derive(Debug, Clone, Copy, Default)]
struct Held {
    pressure: bool,
    transfer: bool,
    temperature: bool,
}

impl Estimator {
    /// An estimator for a leak from `tank` that started at `start_ms`.
    /// `poll_interval_ms` sets how long a gap may be before it is bridged.
    pub fn new(
        tank: &Tank,
        params: LeakParams,
        start_ms: i64,
        poll_interval_ms: i64,
    ) -> ModelResult<Self> {
        let cd = DischargeCoefficient::new(params.cd)?;
        let cd_band = params.cd_band();
        DischargeCoefficient::new(cd_band.0)?;
        DischargeCoefficient::new(cd_band.1)?;
        if !(cd_band.0 <= params.cd && params.cd <= cd_band.1) {
            return Err(crate::model::ModelError::OutOfRange {
                what: "the chosen discharge coefficient (outside its own range)",
                value: params.cd,
                min: cd_band.0,
                max: cd_band.1,
                unit: "",
            });
        }
        let vessel = match params.density_kg_m3 {
            Some(rho) => Vessel::new(
                tank.vessel.geometry().clone(),
                Density::kg_per_cubic_metre(rho),
                tank.vessel.ambient(),
                tank.vessel.vapour().copied(),
            )?,
            None => tank.vessel.clone(),
        };
        let unit_hole = Hole::with_area(
            Area::square_metres(1.0),
            Length::metres(params.hole_height_m),
        )?;
        vessel.check_hole(&unit_hole)?;
        if let Some(d) = params.hole_diameter_m {
            Hole::new(Length::metres(d), Length::metres(params.hole_height_m))?;
        }
        Ok(Self {
            tank: tank.clone(),
            vessel,
            params,
            cd,
            cd_band,
            start_ms,
            gap_limit_ms: gap_limit_ms(poll_interval_ms),
            unit_hole,
            per_unit: PerUnitArea::default(),
            transferred: Trapezoid::new(),
            transferred_magnitude: Trapezoid::new(),
            bridged_kg: 0.0,
            bridge_uncertainty_kg: 0.0,
            before_start: None,
            start: None,
            start_bridged: false,
            start_bridge_per_unit: 0.0,
            lead_in_per_unit: 0.0,
            fit: LineFit::default(),
            level_noise_meter: band::NoiseMeter::default(),
            pressure_noise: band::NoiseMeter::default(),
            pending_jump: None,
            recent_inventory: Window::new(INVENTORY_RATE_WINDOW_MS),
            last: None,
            last_transfer: 0.0,
            last_headspace: None,
            last_temperature: None,
            shown: (0.0, 0.0, 0.0),
            forecast_input: None,
            forecast: None,
            latest: None,
            crossings: tank
                .reportable
                .iter()
                .map(|q| Crossing {
                    quantity_kg: q.si(),
                    at_ms: None,
                    high_at_ms: None,
                })
                .collect(),
            quality: DataQuality::default(),
            loss_seen: false,
            level_mode: false,
            default_accuracies: false,
            noise: 0.0,
            fit_inputs: figures::FitInputs::default(),
            standard: band::Standard::of(tank),
            area_given: params
                .hole_diameter_m
                .map(|d| std::f64::consts::FRAC_PI_4 * d * d),
        }
        .with_defaults_noted())
    }

    pub fn params(&self) -> &LeakParams {
        &self.params
    }

    pub fn start_ms(&self) -> i64 {
        self.start_ms
    }

    /// How far before the start the samples fed in should begin: one gap
    /// limit, so that the level at the start can be interpolated from the
    /// samples either side of it.
    pub fn lookback_ms(&self) -> i64 {
        self.gap_limit_ms
    }

    /// The time of the last sample used, if any.
    pub fn last_sample_ms(&self) -> Option<i64> {
        self.last.map(|l| l.at_ms)
    }

    /// Takes one sample; returns the figures after it, or `None` when the
    /// sample is unusable (before the start, or its level is not good) or
    /// not newer than the last one used. The whole estimate is
    /// [`Estimator::estimate`].
    pub fn push(&mut self, sample: &TankSample) -> Option<Figures> {
        if self.last.is_some_and(|l| sample.at_ms <= l.at_ms) {
            return None;
        }
        if sample.at_ms < self.start_ms {
            self.note_before_start(sample);
            return None;
        }
        let Some(level) = sample.level.value.filter(|_| sample.level.is_good()) else {
            self.quality.samples_skipped += 1;
            return None;
        };
        let height = self.vessel.geometry().height().si();
        if !(-0.01 * height..=1.01 * height).contains(&level) {
            // A level outside the tank is a sensor or scaling fault, not data.
            self.quality.samples_skipped += 1;
            return None;
        }
        if self.is_spike(sample.at_ms, level) {
            self.quality.spikes_rejected += 1;
            self.quality.samples_skipped += 1;
            return None;
        }
        let reading = self.read(sample, level.clamp(0.0, height));
        self.quality.samples_used += 1;
        if reading.held.pressure {
            self.quality.pressure_held += 1;
        }
        if reading.held.transfer {
            self.quality.transfer_held += 1;
        }
        if reading.held.temperature {
            self.quality.temperature_held += 1;
        }

        let first = self.start.is_none();
        if first {
            self.begin(&reading);
        }
        let inventory_before_gap = self.last.map(|l| l.inventory);
        let gap = self.gap_before(reading.at_ms);
        // A gap with a hole known is bridged by the forecast, so the
        // trapezoid must not also span it; without a hole it does (a straight
        // line between the two rates) and the inventory carries the figure.
        let bridging = gap.is_some() && self.hole_and_cd().is_some();
        if bridging {
            self.per_unit.break_here();
        }
        if self.tank.pressure.is_some() && !reading.held.pressure {
            self.pressure_noise.note(reading.state.headspace.si());
        }
        let mut unit = self.unit_outflow(&reading);
        let rates = self.unit_rates(&reading, &mut unit);
        let liquid = unit.phase == Phase::Liquid;
        self.per_unit.push(reading.at_ms, rates, liquid);
        let mass_flow = reading.density * reading.transfer;
        let _ = self.transferred.push(reading.at_ms, mass_flow);
        let _ = self
            .transferred_magnitude
            .push(reading.at_ms, mass_flow.abs());

        let start = self.start.expect("set by begin");
        let mass_now = reading.density * self.vessel.geometry().volume_si(reading.state.level.si());
        let inventory = start.mass - mass_now + self.transferred.total();
        if let Some((gap_ms, last)) = gap.filter(|_| bridging) {
            let before = inventory_before_gap.unwrap_or(0.0);
            self.bridge(gap_ms, &last, inventory - before, &reading);
        }
        self.fit.push(self.per_unit.liquid(), inventory);
        self.note_level(reading.state.level.si());
        if gap.is_some() {
            // The level's own line (its rate, its smoothed figure) starts
            // again after a gap: a flow that stopped or changed in the gap
            // must not be averaged with the flow before it.
            self.recent_inventory.clear();
        }
        self.recent_inventory.push(reading.at_ms, inventory);
        self.last = Some(Last {
            at_ms: reading.at_ms,
            state: reading.state,
            inventory,
        });
        // A lead-in from the start longer than the gap limit is a gap too.
        let gap_from = match gap {
            Some((_, last)) => Some(last.at_ms),
            None if first && self.start_bridged => Some(self.start_ms),
            None => None,
        };
        Some(self.compute(&reading, unit, rates, inventory, gap_from))
    }

    /// [`Estimator::push`], then [`Estimator::estimate`]: the whole estimate
    /// after every sample (for tests and tools that want each one; the
    /// daemon asks for the whole estimate once a poll cycle).
    pub fn push_and_estimate(&mut self, sample: &TankSample) -> Option<Estimate> {
        self.push(sample)?;
        self.estimate()
    }

    /// The whole estimate after the latest sample pushed: its figures with
    /// the band's causes, the fit, the data quality, the crossings and the
    /// forecast. The forecast is made here, from the state at the sample
    /// its schedule picked, so asking more or less often changes nothing:
    /// a replay asked once at its end gives the live run's last estimate.
    pub fn estimate(&mut self) -> Option<Estimate> {
        let mut e = self.latest?.estimate();
        self.fit_details(&mut e);
        e.remaining_above_hole_kg = self
            .vessel
            .liquid_above(Length::metres(e.level_m), &self.unit_hole)
            .si()
            * e.density_kg_m3
            / self.vessel.density().si();
        if let Some(input) = self.forecast_input
            && self
                .forecast
                .is_none_or(|(made_for, _)| made_for != input.at_ms)
        {
            self.forecast = Some((input.at_ms, self.make_forecast(&input)));
        }
        if let Some((_, Some(f))) = self.forecast {
            if self.forecast_capped(&f) {
                e.warnings.insert(Warning::ForecastCapped);
            }
            // A forecast made up to 10 s ago never shows less than has
            // been released since.
            let best = e.released_best_kg;
            e.forecast = Some(ForecastSummary {
                total_at_stop_kg: f.total_at_stop_kg.max(best),
                total_in_15_min_kg: f.total_in_15_min_kg.max(best),
                total_in_1_h_kg: f.total_in_1_h_kg.max(best),
                ..f
            });
        }
        e.crossings.clone_from(&self.crossings);
        Some(e)
    }

    /// The sample's values in SI, with held readings where a reading is bad.
    fn read(&mut self, sample: &TankSample, level: f64) -> Reading {
        let mut held = Held::default();
        let headspace = match self.headspace(sample, level) {
            Some(p) => {
                self.last_headspace = Some(p);
                p
            }
            None if self.tank.pressure.is_some() => {
                held.pressure = true;
                self.last_headspace.unwrap_or(self.tank.assumed_headspace)
            }
            None => self.tank.assumed_headspace,
        };
        let temperature = match self.temperature(sample) {
            Some(t) => {
                self.last_temperature = Some(t);
                Some(t)
            }
            // Held only where the data has the sensor's readings (a
            // readings file without the column has none to hold).
            None if self.tank.temperature.is_some() && sample.temperature.is_some() => {
                held.temperature = true;
                self.last_temperature
            }
            None => None,
        };
        // A good reading from the poller is finite and inside its sensor's
        // range, but one from a historian's file (replay --readings) need
        // not be; such a value is held like a bad reading. A file may carry
        // transfers for a tank whose config maps no meter: those get a bound
        // of their own.
        let plausible = |v: f64| match &self.tank.transfer {
            Some(meter) => meter.accepts(v),
            None => v.is_finite() && v.abs() <= crate::config::MAX_UNMETERED_TRANSFER_M3_S,
        };
        let transfer = match sample.transfer {
            Some(r) if r.is_good() && r.value.is_none_or(plausible) => r.value.unwrap_or(0.0),
            Some(_) => {
                held.transfer = true;
                self.last_transfer
            }
            None => 0.0,
        };
        self.last_transfer = transfer;
        Reading {
            at_ms: sample.at_ms,
            state: TankState {
                level: Length::metres(level),
                headspace,
            },
            density: self.density_at(temperature),
            temperature,
            transfer,
            held,
        }
    }

    /// The headspace gauge pressure from the transmitter, when it reads good
    /// and inside its range; `None` otherwise. A tank with no transmitter
    /// has the configured assumption.
    fn headspace(&self, sample: &TankSample, level: f64) -> Option<Pressure> {
        let Some(sensor) = &self.tank.pressure else {
            return Some(self.tank.assumed_headspace);
        };
        let p = sample
            .pressure
            .and_then(|r| r.value.filter(|&v| r.is_good() && sensor.sensor.accepts(v)))?;
        let reading = if sensor.absolute {
            PressureReading::Absolute(crate::model::AbsolutePressure::pascals(p))
        } else {
            PressureReading::Gauge(Pressure::pascals(p))
        };
        let tap: PressureTap = sensor.tap;
        Some(
            self.vessel
                .headspace_pressure(reading, tap, Length::metres(level)),
        )
    }

    /// The liquid's temperature (K) from a good, in-range reading.
    fn temperature(&self, sample: &TankSample) -> Option<f64> {
        let sensor = self.tank.temperature.as_ref()?;
        sample
            .temperature
            .and_then(|r| r.value.filter(|&v| r.is_good() && sensor.accepts(v)))
    }

    /// The density the figures use at a temperature: the override, or the
    /// tank's density model.
    fn density_at(&self, temperature: Option<f64>) -> f64 {
        match self.params.density_kg_m3 {
            Some(rho) => rho,
            None => self
                .tank
                .density
                .at(temperature.map(Temperature::kelvin))
                .si(),
        }
    }

    /// The flow through the unit hole (1 m² at Cd 1) in this state.
    fn unit_outflow(&self, r: &Reading) -> Outflow {
        self.unit_outflow_in(&r.state, r)
    }

    /// The flow through the unit hole in `state`, at the reading's density.
    fn unit_outflow_in(&self, state: &TankState, r: &Reading) -> Outflow {
        self.vessel.outflow_at(
            state,
            &self.unit_hole,
            DischargeCoefficient::CONSERVATIVE,
            Density::kg_per_cubic_metre(r.density),
        )
    }

    fn note_level(&mut self, level: f64) {
        if self.level_noise_meter.note(level) {
            self.noise = self.measure_noise();
        }
    }

    fn measure_noise(&self) -> f64 {
        self.level_noise_meter
            .standard_deviation()
            .max(self.standard.level_quantisation)
            .max(1e-6)
    }

    /// The level noise, never below the register's quantisation (step /
    /// √12). Kept up to date by `note_level`: it is read several times a
    /// sample.
    fn level_noise(&self) -> f64 {
        self.noise
    }
}

/// How long a gap between samples may be before it is bridged: three poll
/// intervals, and never under 3 s.
pub fn gap_limit_ms(poll_interval_ms: i64) -> i64 {
    (3 * poll_interval_ms).max(3000)
}
