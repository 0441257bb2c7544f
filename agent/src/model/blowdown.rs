//! Blowdown of a tank's gas space (the ullage) through a hole above the
//! liquid: how fast the pressure falls, how much gas leaves, and when it
//! stops or settles.
//!
//! The ullage is a fixed volume V of ideal gas (molar mass M, heat capacity
//! ratio k) at absolute pressure p0 and temperature T0, venting to the
//! ambient pressure pa through a hole of area A with discharge coefficient
//! Cd, by the isentropic nozzle equations of [`super::orifice`]: choked while
//! pa/p <= (2/(k+1))^(k/(k-1)), subcritical after. What happens to the heat
//! is not known, so there are two bounds, and a real vessel lies between:
//!
//! * **isothermal**: the walls keep the gas at T0 (a slow blowdown, a large
//!   wetted wall). Pressure and mass fall together, p = m R T0/(M V). It
//!   releases the most, and takes the longest to reach ambient.
//! * **adiabatic**: no heat reaches the gas, which expands isentropically,
//!   T/T0 = (p/p0)^((k-1)/k). The pressure falls faster, and the cold gas
//!   left at ambient holds more mass, so it releases less, sooner.
//!
//! A blanket supply (a regulator feeding pad gas at up to a given mass rate
//! s, at T0, to hold the pressure at its set point p0) may be on. If it can
//! feed the whole outflow at p0, the pressure holds and the outflow goes on
//! at its initial rate. Otherwise the pressure falls to the steady pressure
//! where the outflow at T0 equals s (both bounds settle there: at steady
//! state the energy balance s cp T0 = m cp T makes T = T0).
//!
//! How it is solved:
//!
//! * **Choked phase, supply off**: closed forms. dp/dt = -p/tau in the
//!   isothermal case, so p = p0 exp(-t/tau); in the adiabatic case
//!   dp/dt = -(k/tau) p (T/T0)^(1/2), which integrates to
//!   p/p0 = (1 + (k-1)/2 t/tau)^(-2k/(k-1)). Both have the same time constant
//!   tau = V / (Cd A psi* sqrt(R T0/M)), with psi*² = k (2/(k+1))^((k+1)/(k-1)).
//! * **Subcritical phase, supply off**: the state is one number (the
//!   pressure fixes the mass and, for the adiabatic bound, the temperature),
//!   so time is a quadrature over pressure, t = integral dp / F(p). The flow
//!   falls as sqrt(p - pa) near ambient, so the pressure reaches ambient in a
//!   finite time but tangentially, which defeats event location in a time
//!   integration (as for the draining liquid in [`super::forecast`]). We
//!   integrate in u = sqrt(p - pa): dt/du = 2u / F(pa + u²) is smooth and
//!   finite down to u = 0, reaching ambient becomes the fixed end u = 0, and
//!   adaptive Gauss–Kronrod does the rest to about 1e-12. The subcritical
//!   flow function is evaluated with `ln_1p` and `exp_m1` in 1 - pa/p, which
//!   keeps its digits as p approaches pa, where the textbook form
//!   r^(2/k) - r^((k+1)/k) cancels. The pressure at a given time is found by
//!   Newton's method on the running integral, whose derivative is the
//!   integrand.
//! * **Supply on**: the pressure settles exponentially on the steady
//!   pressure, above ambient, with no singular end; but the adiabatic bound
//!   now needs two states (mass and pressure: the energy balance no longer
//!   ties T to p), so both bounds are integrated in time, in the state
//!   (p - pa, gas mass, released mass), whose small excess over ambient
//!   keeps its digits. The problem is stiff when the supply is small against
//!   the hole: the pressure settles in milliseconds while the adiabatic gas
//!   warms back to T0 over hours, and an explicit Runge–Kutta method (tried
//!   first) crawls at the fast time scale and may never get there. We use
//!   the 3-stage Radau IIA method (order 5, L-stable, stiffly accurate),
//!   with its stage equations solved by the simplified Newton method on a
//!   difference Jacobian, and error control (relative 1e-11) by step
//!   doubling, which needs no embedded formula. Steps land exactly on the
//!   horizons; the end of choking, a release reaching a given mass and the
//!   outflow settling within 1 % of the supply are located by bisection,
//!   re-stepping from the last accepted point. Once the outflow equals the
//!   supply to 1e-9 (and the temperature T0), the rest is the steady state:
//!   the release grows at s.
//!
//! Left out: evaporation or flashing of the liquid into the ullage (the gas
//! here is what the config names, such as a nitrogen blanket), heat transfer
//! at a finite rate (the two bounds bracket it), a real-gas equation of
//! state, and air drawn in once the pressure is below ambient.

use super::error::{ModelError, ModelResult, non_negative, positive, within};
use super::orifice::{DischargeCoefficient, GasProperties, GasRegime, Hole};
use super::quadrature::{self, Panel};
use super::units::{
    AbsolutePressure, GAS_CONSTANT, Length, Mass, MassRate, Temperature, TimeSpan, Volume,
};
use super::vessel::{AMBIENT_RANGE, Vessel};

/// Relative accuracy asked of the quadrature.
const QUADRATURE_TOL: f64 = 1e-12;

/// Relative accuracy asked of each Radau step.
const STEP_TOL: f64 = 1e-11;

/// The Newton iteration for a step's stages stops once its last change is
/// below this fraction of the step's tolerance (tighter buys nothing but
/// round-off, which the iteration cannot beat).
const NEWTON_TOL: f64 = 0.03;

/// The outflow counts as settled on the supply once within this fraction of
/// it (and stays there): the "steady after" time the reports give.
pub const SETTLED_WITHIN: f64 = 0.01;

/// Beyond this the outflow equals the supply to the last digits that matter,
/// and the rest of the forecast is the steady state.
const CONVERGED_WITHIN: f64 = 1e-9;

/// A budget of Radau steps no case comes near (the stiffest settle in a few
/// hundred).
const MAX_STEPS: usize = 2_000_000;

/// Ullage volumes the model accepts, m³: up to the largest storage tanks
/// built (about 200 000 m³, from memory), with room to spare.
const ULLAGE_RANGE: (f64, f64) = (0.0, 1e6);

/// Headspace pressures the model accepts, Pa absolute: up to 200 bar, past
/// any storage vessel (common practice puts pressure storage below about
/// 25 bar).
const PRESSURE_RANGE: (f64, f64) = (1.0, 2e7);

/// Pad gas supplies the model accepts, kg/s (3 600 t/h, far past any
/// blanketing regulator).
const SUPPLY_RANGE: (f64, f64) = (0.0, 1000.0);

/// Which end of the thermal truth a blowdown takes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Thermal {
    /// The gas stays at its initial temperature.
    Isothermal,
    /// No heat reaches the gas: it cools as it expands.
    Adiabatic,
}

impl Thermal {
    pub fn name(self) -> &'static str {
        match self {
            Thermal::Isothermal => "isothermal",
            Thermal::Adiabatic => "adiabatic",
        }
    }
}

/// The gas space above the liquid: its volume, its gas and its pressure.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Ullage {
    volume: Volume,
    gas: GasProperties,
    pressure: AbsolutePressure,
    ambient: AbsolutePressure,
}

impl Ullage {
    /// `pressure` is the headspace's absolute pressure (at the gas's
    /// temperature, `gas.temperature()`), `ambient` the outside's.
    pub fn new(
        volume: Volume,
        gas: GasProperties,
        pressure: AbsolutePressure,
        ambient: AbsolutePressure,
    ) -> ModelResult<Self> {
        positive("ullage volume", volume.si(), "m³")?;
        within("ullage volume", volume.si(), ULLAGE_RANGE, "m³")?;
        within(
            "headspace absolute pressure",
            pressure.si(),
            PRESSURE_RANGE,
            "Pa",
        )?;
        within("ambient pressure", ambient.si(), AMBIENT_RANGE, "Pa")?;
        Ok(Self {
            volume,
            gas,
            pressure,
            ambient,
        })
    }

    pub fn volume(&self) -> Volume {
        self.volume
    }

    pub fn gas(&self) -> &GasProperties {
        &self.gas
    }

    pub fn pressure(&self) -> AbsolutePressure {
        self.pressure
    }

    pub fn ambient(&self) -> AbsolutePressure {
        self.ambient
    }

    /// The gas it holds, by the ideal gas law.
    pub fn gas_mass(&self) -> Mass {
        Mass::kilograms(
            self.pressure.si() * self.volume.si() * self.gas.molar_mass().si()
                / (GAS_CONSTANT * self.gas.temperature().si()),
        )
    }
}

/// The gas space of a tank at a level: the tank's capacity less the liquid.
pub fn ullage_volume(vessel: &Vessel, level: Length) -> ModelResult<Volume> {
    let g = vessel.geometry();
    let h = g.check_level(level)?;
    Ok(Volume::cubic_metres(
        (g.capacity().si() - g.volume_si(h)).max(0.0),
    ))
}

/// The state of a blowdown at one moment.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BlowdownPoint {
    /// Time from the start.
    pub after: TimeSpan,
    pub pressure: AbsolutePressure,
    pub temperature: Temperature,
    /// The outflow through the hole, and its regime (`None` when nothing flows).
    pub rate: MassRate,
    pub regime: Option<GasRegime>,
    /// Released through the hole since the start.
    pub released: Mass,
}

/// How a blowdown ends.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum BlowdownEnd {
    /// Nothing flows: the headspace is not above ambient.
    NoFlow,
    /// The pressure reaches ambient after this long and the flow stops.
    Ambient { after: TimeSpan },
    /// With the supply on, the pressure settles at `pressure`, where the
    /// outflow equals the supply; `after` is when the outflow came within
    /// [`SETTLED_WITHIN`] of the supply for good.
    Steady {
        pressure: AbsolutePressure,
        after: TimeSpan,
    },
    /// The supply feeds the whole outflow at the initial pressure, which
    /// holds: the outflow goes on at its initial rate.
    Held,
}

/// The outcome of a blowdown forecast.
#[derive(Debug, Clone, PartialEq)]
pub struct BlowdownForecast {
    pub thermal: Thermal,
    /// The gas in the ullage at the start.
    pub initial_gas: Mass,
    pub initial: BlowdownPoint,
    /// How long the flow stays choked: zero if subcritical from the start,
    /// infinite if it never stops being choked (a supply that holds it).
    pub choked_for: TimeSpan,
    pub end: BlowdownEnd,
    /// Released from the start until the end (to ambient, or until the
    /// outflow settles); zero when nothing flows or the pressure holds.
    pub released_by_end: Mass,
    /// The outflow after the end: zero at ambient, the supply once steady,
    /// the initial rate when the pressure holds.
    pub rate_after_end: MassRate,
    /// One point per requested horizon, in the order requested.
    pub horizons: Vec<BlowdownPoint>,
    /// When each requested release mass is reached, in the order requested;
    /// `None` if never.
    pub release_times: Vec<Option<TimeSpan>>,
}

/// A blowdown problem: an ullage, a hole, a Cd, a supply and a thermal bound.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Blowdown {
    ullage: Ullage,
    thermal: Thermal,
    /// Cd times the hole area, m².
    cda: f64,
    /// Pad gas supply, kg/s.
    supply: f64,
    k: f64,
    molar_mass: f64,
    t0: f64,
    p0: f64,
    pa: f64,
    volume: f64,
    critical_ratio: f64,
    /// k (2/(k+1))^((k+1)/(k-1)): the square of the choked flow function.
    choked_flux_sq: f64,
}

impl Blowdown {
    pub fn new(
        ullage: Ullage,
        hole: &Hole,
        cd: DischargeCoefficient,
        supply: MassRate,
        thermal: Thermal,
    ) -> ModelResult<Self> {
        non_negative("blanket supply", supply.si(), "kg/s")?;
        within("blanket supply", supply.si(), SUPPLY_RANGE, "kg/s")?;
        let gas = ullage.gas;
        let k = gas.heat_capacity_ratio();
        Ok(Self {
            ullage,
            thermal,
            cda: cd.get() * hole.area().si(),
            supply: supply.si(),
            k,
            molar_mass: gas.molar_mass().si(),
            t0: gas.temperature().si(),
            p0: ullage.pressure.si(),
            pa: ullage.ambient.si(),
            volume: ullage.volume.si(),
            critical_ratio: gas.critical_pressure_ratio(),
            choked_flux_sq: k * (2.0 / (k + 1.0)).powf((k + 1.0) / (k - 1.0)),
        })
    }

    /// The time constant of the choked phase, tau = V / (Cd A psi* sqrt(R T0/M)):
    /// the e-folding time of the isothermal pressure while choked.
    pub fn time_constant(&self) -> TimeSpan {
        TimeSpan::seconds(
            self.volume
                / (self.cda
                    * self.choked_flux_sq.sqrt()
                    * (GAS_CONSTANT * self.t0 / self.molar_mass).sqrt()),
        )
    }

    /// The headspace pressure above which the flow is choked.
    pub fn critical_pressure(&self) -> AbsolutePressure {
        AbsolutePressure::pascals(self.pa / self.critical_ratio)
    }

    /// The outflow at a headspace pressure and gas temperature, by the
    /// nozzle equations (the same as [`super::orifice::gas_mass_rate`], in
    /// a form that keeps its digits near ambient).
    pub fn outflow(
        &self,
        pressure: AbsolutePressure,
        temperature: Temperature,
    ) -> (MassRate, Option<GasRegime>) {
        let (rate, regime) = self.rate(pressure.si() - self.pa, temperature.si());
        (MassRate::kg_per_second(rate), regime)
    }

    /// The pressure at which the outflow at T0 equals the supply, when the
    /// supply is on but cannot hold the initial pressure.
    pub fn steady_pressure(&self) -> Option<AbsolutePressure> {
        let x0 = self.p0 - self.pa;
        if self.supply <= 0.0 || x0 <= 0.0 || self.supply >= self.rate(x0, self.t0).0 {
            return None;
        }
        Some(AbsolutePressure::pascals(self.pa + self.steady_excess()))
    }

    /// Forecasts the blowdown and reports the state at each of `horizons`
    /// and when each of `releases` has left.
    pub fn forecast(
        &self,
        horizons: &[TimeSpan],
        releases: &[Mass],
    ) -> ModelResult<BlowdownForecast> {
        for t in horizons {
            non_negative("forecast horizon", t.si(), "s")?;
        }
        for m in releases {
            non_negative("released mass", m.si(), "kg")?;
        }
        let x0 = self.p0 - self.pa;
        let initial = self.point_at(0.0, x0, self.t0, 0.0);
        let mut forecast = BlowdownForecast {
            thermal: self.thermal,
            initial_gas: self.ullage.gas_mass(),
            initial,
            choked_for: TimeSpan::ZERO,
            end: BlowdownEnd::NoFlow,
            released_by_end: Mass::ZERO,
            rate_after_end: MassRate::ZERO,
            horizons: Vec::new(),
            release_times: Vec::new(),
        };
        if x0 <= 0.0 {
            // Nothing leaves; the supply, if any, has nothing to make up.
            forecast.horizons = horizons
                .iter()
                .map(|&after| BlowdownPoint { after, ..initial })
                .collect();
            forecast.release_times = releases
                .iter()
                .map(|m| (m.si() == 0.0).then_some(TimeSpan::ZERO))
                .collect();
            return Ok(forecast);
        }
        let rate0 = initial.rate.si();
        if self.supply >= rate0 {
            // The regulator makes up the whole outflow: nothing changes.
            forecast.end = BlowdownEnd::Held;
            forecast.rate_after_end = initial.rate;
            forecast.choked_for = match initial.regime {
                Some(GasRegime::Choked) => TimeSpan::seconds(f64::INFINITY),
                _ => TimeSpan::ZERO,
            };
            forecast.horizons = horizons
                .iter()
                .map(|&after| BlowdownPoint {
                    after,
                    released: Mass::kilograms(rate0 * after.si()),
                    ..initial
                })
                .collect();
            forecast.release_times = releases
                .iter()
                .map(|m| Some(TimeSpan::seconds(m.si() / rate0)))
                .collect();
            return Ok(forecast);
        }
        if self.supply > 0.0 {
            self.supplied(forecast, horizons, releases)
        } else {
            Ok(self.vented(forecast, horizons, releases))
        }
    }

    // -----------------------------------------------------------------
    // The flow

    /// Outflow (kg/s) and regime at excess pressure `x = p - pa` and gas
    /// temperature `t`.
    fn rate(&self, x: f64, t: f64) -> (f64, Option<GasRegime>) {
        if x.is_nan() || x <= 0.0 {
            return (0.0, None);
        }
        let p = self.pa + x;
        let m_over_rt = self.molar_mass / (GAS_CONSTANT * t);
        if self.pa <= self.critical_ratio * p {
            (
                self.cda * p * (m_over_rt * self.choked_flux_sq).sqrt(),
                Some(GasRegime::Choked),
            )
        } else {
            let eps = x / p;
            (
                self.cda * p * (m_over_rt * eps * subcritical_flux_sq_per_eps(self.k, eps)).sqrt(),
                Some(GasRegime::Subcritical),
            )
        }
    }

    fn point_at(&self, after: f64, x: f64, t: f64, released: f64) -> BlowdownPoint {
        let (rate, regime) = self.rate(x, t);
        BlowdownPoint {
            after: TimeSpan::seconds(after),
            pressure: AbsolutePressure::pascals(self.pa + x.max(0.0)),
            temperature: Temperature::kelvin(t),
            rate: MassRate::kg_per_second(rate),
            regime,
            released: Mass::kilograms(released),
        }
    }

    /// Excess pressure over ambient at which the flow turns subcritical.
    fn critical_excess(&self) -> f64 {
        self.pa * (1.0 / self.critical_ratio - 1.0)
    }

    // -----------------------------------------------------------------
    // Supply off: closed forms and quadrature

    /// The gas temperature at pressure p with no supply.
    fn vented_temperature(&self, p: f64) -> f64 {
        match self.thermal {
            Thermal::Isothermal => self.t0,
            Thermal::Adiabatic => self.t0 * (p / self.p0).powf((self.k - 1.0) / self.k),
        }
    }

    /// Released with no supply once the excess pressure is down to x: the
    /// gas no longer in the ullage.
    fn vented_released(&self, x: f64) -> f64 {
        let m0 = self.ullage.gas_mass().si();
        match self.thermal {
            Thermal::Isothermal => {
                (self.p0 - self.pa - x) * self.volume * self.molar_mass / (GAS_CONSTANT * self.t0)
            }
            Thermal::Adiabatic => m0 * (1.0 - ((self.pa + x) / self.p0).powf(1.0 / self.k)),
        }
    }

    /// The excess pressure once `mass` has left with no supply (None if the
    /// ullage never releases that much).
    fn vented_excess_after(&self, mass: f64) -> Option<f64> {
        let total = self.vented_released(0.0);
        if mass > total {
            return None;
        }
        let x = match self.thermal {
            Thermal::Isothermal => {
                self.p0 - self.pa - mass * GAS_CONSTANT * self.t0 / (self.volume * self.molar_mass)
            }
            Thermal::Adiabatic => {
                let m0 = self.ullage.gas_mass().si();
                self.p0 * (1.0 - mass / m0).powf(self.k) - self.pa
            }
        };
        Some(x.clamp(0.0, self.p0 - self.pa))
    }

    /// Choked phase, closed forms: the pressure after time t.
    fn choked_pressure(&self, t: f64) -> f64 {
        let tau = self.time_constant().si();
        match self.thermal {
            Thermal::Isothermal => self.p0 * (-t / tau).exp(),
            Thermal::Adiabatic => {
                let k = self.k;
                self.p0 * (1.0 + 0.5 * (k - 1.0) * t / tau).powf(-2.0 * k / (k - 1.0))
            }
        }
    }

    /// Choked phase, closed forms: the time to fall to pressure p.
    fn choked_time(&self, p: f64) -> f64 {
        let tau = self.time_constant().si();
        match self.thermal {
            Thermal::Isothermal => tau * (self.p0 / p).ln(),
            Thermal::Adiabatic => {
                let k = self.k;
                2.0 * tau / (k - 1.0) * ((self.p0 / p).powf((k - 1.0) / (2.0 * k)) - 1.0)
            }
        }
    }

    /// Subcritical phase, supply off: dt/du with p = pa + u². The flow is
    /// u times a smooth function of u, which cancels the u of dp = 2u du.
    fn dt_du(&self, u: f64) -> f64 {
        let x = u * u;
        let p = self.pa + x;
        let t = self.vented_temperature(p);
        let m_over_rt = self.molar_mass / (GAS_CONSTANT * t);
        let rate_per_u =
            self.cda * p.sqrt() * (m_over_rt * subcritical_flux_sq_per_eps(self.k, x / p)).sqrt();
        // How fast the pressure falls per kilogram released.
        let pressure_per_kg = match self.thermal {
            Thermal::Isothermal => GAS_CONSTANT * self.t0 / (self.molar_mass * self.volume),
            Thermal::Adiabatic => self.k * GAS_CONSTANT * t / (self.molar_mass * self.volume),
        };
        2.0 / (pressure_per_kg * rate_per_u)
    }

    fn vented(
        &self,
        mut forecast: BlowdownForecast,
        horizons: &[TimeSpan],
        releases: &[Mass],
    ) -> BlowdownForecast {
        let x0 = self.p0 - self.pa;
        let xc = self.critical_excess();
        let choked_for = if x0 > xc {
            self.choked_time(self.pa + xc)
        } else {
            0.0
        };
        let u_top = x0.min(xc).sqrt();
        let panels = quadrature::integrate(&mut |u| self.dt_du(u), &[0.0, u_top], QUADRATURE_TOL);
        let subcritical_for: f64 = panels.iter().map(|p| p.integral).sum();
        let ends_after = choked_for + subcritical_for;

        let excess_at = |t: f64| -> f64 {
            if t < choked_for {
                self.choked_pressure(t) - self.pa
            } else if t < ends_after {
                let u = u_at_time(&mut |u| self.dt_du(u), &panels, t - choked_for);
                u * u
            } else {
                0.0
            }
        };
        forecast.horizons = horizons
            .iter()
            .map(|after| {
                let x = excess_at(after.si());
                let t = self.vented_temperature(self.pa + x);
                self.point_at(after.si(), x, t, self.vented_released(x))
            })
            .collect();
        forecast.release_times = releases
            .iter()
            .map(|m| {
                let x = self.vented_excess_after(m.si())?;
                let t = if x >= xc {
                    self.choked_time(self.pa + x)
                } else {
                    let u = x.sqrt();
                    let above: f64 =
                        quadrature::integrate(&mut |u| self.dt_du(u), &[u, u_top], QUADRATURE_TOL)
                            .iter()
                            .map(|p| p.integral)
                            .sum();
                    choked_for + above
                };
                Some(TimeSpan::seconds(t.min(ends_after)))
            })
            .collect();
        forecast.choked_for = TimeSpan::seconds(choked_for);
        forecast.end = BlowdownEnd::Ambient {
            after: TimeSpan::seconds(ends_after),
        };
        forecast.released_by_end = Mass::kilograms(self.vented_released(0.0));
        forecast
    }

    // -----------------------------------------------------------------
    // Supply on: time integration

    /// The excess pressure at which the outflow at T0 equals the supply, by
    /// bisection (the outflow rises strictly with the pressure).
    fn steady_excess(&self) -> f64 {
        let (mut lo, mut hi) = (0.0, self.p0 - self.pa);
        for _ in 0..200 {
            let mid = 0.5 * (lo + hi);
            if mid <= lo || mid >= hi {
                break;
            }
            if self.rate(mid, self.t0).0 < self.supply {
                lo = mid;
            } else {
                hi = mid;
            }
        }
        0.5 * (lo + hi)
    }

    /// The gas temperature in state y = (excess, gas mass, released).
    fn state_temperature(&self, y: &State) -> f64 {
        match self.thermal {
            Thermal::Isothermal => self.t0,
            Thermal::Adiabatic => {
                (self.pa + y[0]) * self.volume * self.molar_mass / (y[1] * GAS_CONSTANT)
            }
        }
    }

    /// The mass and energy balances with the supply on: d/dt of
    /// (p - pa, gas mass, released).
    ///
    /// Isothermal: dp/dt = R T0/(M V) (s - m). Adiabatic, from
    /// d(p V/(k-1))/dt = cp (s T0 - m T) with cp = k R/((k-1) M):
    /// dp/dt = k R/(M V) (s T0 - m T).
    fn derivatives(&self, y: &State) -> State {
        let t = self.state_temperature(y);
        let (out, _) = self.rate(y[0], t);
        let dp = match self.thermal {
            Thermal::Isothermal => {
                GAS_CONSTANT * self.t0 / (self.molar_mass * self.volume) * (self.supply - out)
            }
            Thermal::Adiabatic => {
                self.k * GAS_CONSTANT / (self.molar_mass * self.volume)
                    * (self.supply * self.t0 - out * t)
            }
        };
        [dp, self.supply - out, out]
    }

    fn supplied(
        &self,
        mut forecast: BlowdownForecast,
        horizons: &[TimeSpan],
        releases: &[Mass],
    ) -> ModelResult<BlowdownForecast> {
        let x0 = self.p0 - self.pa;
        let xc = self.critical_excess();
        let x_steady = self.steady_excess();
        let m0 = self.ullage.gas_mass().si();
        let m_steady =
            (self.pa + x_steady) * self.volume * self.molar_mass / (GAS_CONSTANT * self.t0);
        // Absolute tolerances scaled to the steady state, which the state
        // approaches and (for the excess) never falls far below.
        let scale = [x_steady.min(x0), m_steady.min(m0), m0];
        let stepper = Stepper::new(self, scale);

        let mut order: Vec<usize> = (0..horizons.len()).collect();
        order.sort_by(|&a, &b| horizons[a].si().total_cmp(&horizons[b].si()));
        let mut next_horizon = 0;
        let mut points = vec![None; horizons.len()];
        let mut release_times: Vec<Option<f64>> = releases
            .iter()
            .map(|m| (m.si() == 0.0).then_some(0.0))
            .collect();

        let mut t = 0.0;
        let mut y: State = [x0, m0, 0.0];
        let inventory_time = m0 / forecast.initial.rate.si();
        let mut h = 1e-3 * inventory_time.min(self.time_constant().si());
        let mut choked = x0 > xc;
        let mut choked_for = 0.0;
        let mut settled_at: Option<(f64, f64)> = None;
        let unsettled = |y: &State| {
            let (out, _) = self.rate(y[0], self.state_temperature(y));
            (out - self.supply).abs() - SETTLED_WITHIN * self.supply
        };

        // Horizons at the start take the initial state.
        while let Some(&i) = order.get(next_horizon) {
            if horizons[i].si() > 0.0 {
                break;
            }
            points[i] = Some(BlowdownPoint {
                after: horizons[i],
                ..forecast.initial
            });
            next_horizon += 1;
        }

        let mut steps = 0;
        loop {
            let (out, _) = self.rate(y[0], self.state_temperature(&y));
            let converged = (out / self.supply - 1.0).abs() <= CONVERGED_WITHIN
                && (self.state_temperature(&y) / self.t0 - 1.0).abs() <= CONVERGED_WITHIN
                && settled_at.is_some();
            if converged {
                break;
            }
            steps += 1;
            if steps > MAX_STEPS {
                return Err(ModelError::NotConverged {
                    what: "blowdown with the blanket supply on",
                    steps: MAX_STEPS,
                });
            }
            // Land exactly on the next horizon.
            let landing = order
                .get(next_horizon)
                .map(|&i| horizons[i].si())
                .filter(|&th| th > t && th <= t + h);
            let step = landing.map_or(h, |th| th - t);
            let Some((y_new, error)) = stepper.step(&y, step).filter(|(y, _)| y[1] > 0.0) else {
                // The stage equations did not converge: a shorter step.
                h = 0.25 * step;
                continue;
            };
            if error > 1.0 {
                h = step * (0.9 * error.powf(-1.0 / 6.0)).clamp(0.1, 0.5);
                continue;
            }
            let t_new = landing.unwrap_or(t + step);

            // Events inside the step, located by re-stepping.
            if choked && y_new[0] <= xc {
                choked_for = t + stepper.locate(&y, step, |y| y[0] - xc);
                choked = false;
            }
            for (i, m) in releases.iter().enumerate() {
                if release_times[i].is_none() && y_new[2] >= m.si() {
                    release_times[i] = Some(t + stepper.locate(&y, step, |y| m.si() - y[2]));
                }
            }
            let (before, after) = (unsettled(&y), unsettled(&y_new));
            if after <= 0.0 && (before > 0.0 || settled_at.is_none()) {
                let at = if before > 0.0 {
                    t + stepper.locate(&y, step, |y| unsettled(y))
                } else {
                    t
                };
                let released = stepper.step(&y, at - t).map_or(y[2], |(y, _)| y[2]);
                settled_at = Some((at, released));
            } else if after > 0.0 {
                settled_at = None;
            }

            t = t_new;
            y = y_new;
            while let Some(&i) = order.get(next_horizon) {
                if horizons[i].si() > t {
                    break;
                }
                let temperature = self.state_temperature(&y);
                points[i] = Some(self.point_at(horizons[i].si(), y[0], temperature, y[2]));
                next_horizon += 1;
            }
            h = step * (0.9 * error.max(1e-12).powf(-1.0 / 6.0)).clamp(0.2, 4.0);
        }

        // Steady from here on: the outflow is the supply.
        let temperature = self.state_temperature(&y);
        for &i in &order[next_horizon..] {
            let after = horizons[i].si();
            let released = y[2] + self.supply * (after - t);
            points[i] = Some(self.point_at(after, y[0], temperature, released));
        }
        for (i, m) in releases.iter().enumerate() {
            if release_times[i].is_none() {
                release_times[i] = Some(t + (m.si() - y[2]) / self.supply);
            }
        }
        let (settled, released_by_settling) = settled_at.unwrap_or((t, y[2]));
        forecast.horizons = points.into_iter().flatten().collect();
        forecast.release_times = release_times
            .into_iter()
            .map(|t| t.map(TimeSpan::seconds))
            .collect();
        // Still choked at the steady pressure: choked for good.
        forecast.choked_for = TimeSpan::seconds(if choked { f64::INFINITY } else { choked_for });
        forecast.end = BlowdownEnd::Steady {
            pressure: AbsolutePressure::pascals(self.pa + x_steady),
            after: TimeSpan::seconds(settled),
        };
        forecast.released_by_end = Mass::kilograms(released_by_settling);
        forecast.rate_after_end = MassRate::kg_per_second(self.supply);
        Ok(forecast)
    }
}

/// psi² / eps for the subcritical flow function, with eps = 1 - pa/p:
/// psi² = 2k/(k-1) (r^(2/k) - r^((k+1)/k)) = 2k/(k-1) r^(2/k) (1 - r^((k-1)/k)),
/// and 1 - r^a = -expm1(a ln(1 - eps)), which keeps its digits as eps -> 0,
/// where the ratio tends to 2.
fn subcritical_flux_sq_per_eps(k: f64, eps: f64) -> f64 {
    let a = (k - 1.0) / k;
    let one_less = if eps > 0.0 {
        -(a * (-eps).ln_1p()).exp_m1() / eps
    } else {
        a
    };
    2.0 * k / (k - 1.0) * (1.0 - eps).powf(2.0 / k) * one_less
}

/// Finds u where the running integral of `f` from u up to the top of the
/// panels reaches `target` (less than the whole); time runs from the top
/// panel down, as the pressure falls.
fn u_at_time(f: &mut impl FnMut(f64) -> f64, panels: &[Panel], target: f64) -> f64 {
    let mut elapsed = 0.0;
    for (i, panel) in panels.iter().enumerate().rev() {
        if target < elapsed + panel.integral || i == 0 {
            return solve_in_panel(f, panel, target - elapsed);
        }
        elapsed += panel.integral;
    }
    0.0
}

/// Solves g(u) = (integral of f from u to the panel's top) - target = 0 by
/// Newton's method inside the panel, falling back on bisection; g falls as
/// u rises and g' = -f.
fn solve_in_panel(f: &mut impl FnMut(f64) -> f64, panel: &Panel, target: f64) -> f64 {
    let (mut lo, mut hi) = (panel.from, panel.to);
    let fraction = if panel.integral > 0.0 {
        (target / panel.integral).clamp(0.0, 1.0)
    } else {
        0.0
    };
    let mut u = hi - fraction * (hi - lo);
    for _ in 0..100 {
        let g = quadrature::kronrod15(f, u, panel.to).0 - target;
        if g > 0.0 {
            lo = u;
        } else {
            hi = u;
        }
        let slope = f(u);
        let newton = u + g / slope;
        let next = if slope > 0.0 && newton > lo && newton < hi {
            newton
        } else {
            0.5 * (lo + hi)
        };
        if (next - u).abs() <= 4.0 * f64::EPSILON * panel.to.max(1e-300) {
            return next;
        }
        u = next;
    }
    u
}

/// (p - pa, gas mass, released mass).
type State = [f64; 3];

/// Radau IIA steps with error control, for the blowdown with the supply on.
///
/// The problem turns stiff when the supply is small against the hole: the
/// pressure then settles on a quasi-steady value within milliseconds while
/// (adiabatic bound) the gas warms back to T0 over hours, and an explicit
/// method would crawl at the fast time scale. The 3-stage Radau IIA method
/// (order 5, L-stable, stiffly accurate) takes steps at the slow one.
struct Stepper<'a> {
    blowdown: &'a Blowdown,
    /// Absolute tolerance per state component, as a multiple of STEP_TOL.
    scale: [f64; 3],
    /// The Radau IIA coefficients.
    a: [[f64; 3]; 3],
}

/// The 3-stage Radau IIA coefficients (E. Hairer and G. Wanner, Solving
/// Ordinary Differential Equations II, 2nd ed., Springer 1996, section IV.5;
/// written out as recalled, with sqrt 6, and checked in the tests below
/// against the simplifying conditions B(5) and C(3), which the method
/// satisfies and which fix its coefficients). Nodes c = ((4 - sqrt 6)/10,
/// (4 + sqrt 6)/10, 1); the weights are the last row.
fn radau_coefficients() -> ([f64; 3], [[f64; 3]; 3]) {
    let r = 6f64.sqrt();
    (
        [(4.0 - r) / 10.0, (4.0 + r) / 10.0, 1.0],
        [
            [
                (88.0 - 7.0 * r) / 360.0,
                (296.0 - 169.0 * r) / 1800.0,
                (-2.0 + 3.0 * r) / 225.0,
            ],
            [
                (296.0 + 169.0 * r) / 1800.0,
                (88.0 + 7.0 * r) / 360.0,
                (-2.0 - 3.0 * r) / 225.0,
            ],
            [(16.0 - r) / 36.0, (16.0 + r) / 36.0, 1.0 / 9.0],
        ],
    )
}

impl<'a> Stepper<'a> {
    fn new(blowdown: &'a Blowdown, scale: [f64; 3]) -> Self {
        Self {
            blowdown,
            scale,
            a: radau_coefficients().1,
        }
    }

    fn tolerance(&self, c: usize, y: &State) -> f64 {
        STEP_TOL * (self.scale[c] + y[c].abs())
    }

    /// The state after a step of `h` from `y`, and the scaled error
    /// estimate (accept the step when it is at most 1), by step doubling:
    /// one step of h against two of h/2, whose difference is 2^5 - 1 times
    /// the error of the pair for a method of order 5. The two half steps are
    /// the answer. `None` when the stage equations do not converge (the
    /// caller shortens the step).
    fn step(&self, y: &State, h: f64) -> Option<(State, f64)> {
        let whole = self.radau(y, h)?;
        let half = self.radau(&self.radau(y, 0.5 * h)?, 0.5 * h)?;
        let mut error: f64 = 0.0;
        for c in 0..3 {
            let e = (half[c] - whole[c]).abs() / 31.0;
            error = error.max(e / self.tolerance(c, &half));
        }
        Some((half, error))
    }

    /// One Radau IIA step: solves Z_i = h sum_j a_ij f(y + Z_j) by the
    /// simplified Newton method (the Jacobian at y, by differences), and
    /// returns y + Z_3 (the method is stiffly accurate).
    fn radau(&self, y: &State, h: f64) -> Option<State> {
        let f = |state: &State| self.blowdown.derivatives(state);
        let f0 = f(y);
        let mut jacobian = [[0.0; 3]; 3];
        for col in 0..3 {
            let delta = 1e-7 * (y[col].abs() + self.scale[col]).max(f64::MIN_POSITIVE);
            let mut shifted = *y;
            shifted[col] += delta;
            let fs = f(&shifted);
            for row in 0..3 {
                jacobian[row][col] = (fs[row] - f0[row]) / delta;
            }
        }
        // M = I - h (A ⊗ J), a 9×9 matrix, index (stage * 3 + component).
        let mut m = [[0.0; 9]; 9];
        for i in 0..3 {
            for j in 0..3 {
                for r in 0..3 {
                    for c in 0..3 {
                        m[i * 3 + r][j * 3 + c] = -h * self.a[i][j] * jacobian[r][c];
                    }
                }
            }
        }
        for (d, row) in m.iter_mut().enumerate() {
            row[d] += 1.0;
        }
        let lu = Lu::new(m)?;
        let mut z = [0.0; 9];
        let mut previous_norm = f64::INFINITY;
        for _ in 0..20 {
            let mut stage_f = [[0.0; 3]; 3];
            for (i, fi) in stage_f.iter_mut().enumerate() {
                let mut yi = *y;
                for c in 0..3 {
                    yi[c] += z[i * 3 + c];
                }
                *fi = f(&yi);
            }
            let mut residual = [0.0; 9];
            for i in 0..3 {
                for c in 0..3 {
                    let sum: f64 = (0..3).map(|j| self.a[i][j] * stage_f[j][c]).sum();
                    residual[i * 3 + c] = -(z[i * 3 + c] - h * sum);
                }
            }
            let dz = lu.solve(residual);
            let mut norm: f64 = 0.0;
            for i in 0..3 {
                for c in 0..3 {
                    z[i * 3 + c] += dz[i * 3 + c];
                    norm = norm.max(dz[i * 3 + c].abs() / self.tolerance(c, y));
                }
            }
            if !norm.is_finite() || (norm > 0.9 * previous_norm && norm > NEWTON_TOL) {
                return None;
            }
            if norm <= NEWTON_TOL {
                let mut out = *y;
                for c in 0..3 {
                    out[c] += z[6 + c];
                }
                return out.iter().all(|v| v.is_finite()).then_some(out);
            }
            previous_norm = norm;
        }
        None
    }

    /// Where in a step of `h` from `y` the indicator `g` changes sign from
    /// positive (at the start) to zero or below, by bisection on steps from
    /// `y`; each such step is shorter than the accepted one, so no less
    /// accurate. Returns the time from the step's start.
    fn locate(&self, y: &State, h: f64, g: impl Fn(&State) -> f64) -> f64 {
        let (mut lo, mut hi) = (0.0, h);
        for _ in 0..200 {
            let mid = 0.5 * (lo + hi);
            if mid <= lo || mid >= hi {
                break;
            }
            match self.step(y, mid) {
                Some((state, _)) if g(&state) > 0.0 => lo = mid,
                _ => hi = mid,
            }
        }
        hi
    }
}

/// An LU factorisation with partial pivoting of a 9×9 matrix.
struct Lu {
    m: [[f64; 9]; 9],
    pivot: [usize; 9],
}

impl Lu {
    /// `None` if the matrix is singular to working precision.
    fn new(mut m: [[f64; 9]; 9]) -> Option<Self> {
        let mut pivot = [0; 9];
        for col in 0..9 {
            let best = (col..9).max_by(|&a, &b| m[a][col].abs().total_cmp(&m[b][col].abs()))?;
            if m[best][col] == 0.0 || !m[best][col].is_finite() {
                return None;
            }
            m.swap(col, best);
            pivot[col] = best;
            let pivot_row = m[col];
            for row in m.iter_mut().skip(col + 1) {
                let factor = row[col] / pivot_row[col];
                row[col] = factor;
                for (value, above) in row.iter_mut().zip(pivot_row).skip(col + 1) {
                    *value -= factor * above;
                }
            }
        }
        Some(Self { m, pivot })
    }

    /// Solves M x = b. The factorisation swapped whole rows (its stored
    /// multipliers included), so P M = L U: all the swaps first, then the
    /// two triangular solves.
    fn solve(&self, mut b: [f64; 9]) -> [f64; 9] {
        for (col, &pivot) in self.pivot.iter().enumerate() {
            b.swap(col, pivot);
        }
        for col in 0..9 {
            for row in col + 1..9 {
                b[row] -= self.m[row][col] * b[col];
            }
        }
        for col in (0..9).rev() {
            for c in col + 1..9 {
                b[col] -= self.m[col][c] * b[c];
            }
            b[col] /= self.m[col][col];
        }
        b
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::orifice::gas_mass_rate;
    use crate::model::units::MolarMass;

    fn nitrogen() -> GasProperties {
        GasProperties::new(MolarMass::g_per_mol(28.01), 1.4, Temperature::celsius(15.0)).unwrap()
    }

    fn case(gauge_kpa: f64, supply: f64, thermal: Thermal) -> Blowdown {
        let ambient = AbsolutePressure::STANDARD_ATMOSPHERE;
        let ullage = Ullage::new(
            Volume::cubic_metres(3.0),
            nitrogen(),
            ambient + crate::model::Pressure::kilopascals(gauge_kpa),
            ambient,
        )
        .unwrap();
        let hole = Hole::new(Length::millimetres(20.0), Length::metres(2.0)).unwrap();
        Blowdown::new(
            ullage,
            &hole,
            DischargeCoefficient::SHARP_EDGED,
            MassRate::kg_per_second(supply),
            thermal,
        )
        .unwrap()
    }

    #[test]
    fn stiff_and_extreme_cases_settle_quickly_with_ordered_figures() {
        // A small supply against a large hole is stiff (the pressure settles
        // in milliseconds, the adiabatic gas warms back over hours or
        // years); so are the extremes of the accepted ranges. Each must
        // settle, with finite figures that only grow.
        let ambient = AbsolutePressure::STANDARD_ATMOSPHERE;
        let cases = [
            // (ullage m³, gauge kPa, hole mm, supply kg/s)
            (3.0, 15.0, 20.0, 1e-9),
            (2.2, 15.0, 101.6, 0.0017),
            (1e5, 15.0, 0.1, 1e-7),
            (0.001, 1e4, 5000.0, 1.0),
            (0.001, 1e4, 0.1, 1e-9),
            (1e5, 5000.0, 5000.0, 100.0),
            (3.0, 0.001, 20.0, 1e-6),
        ];
        let horizons = [
            TimeSpan::ZERO,
            TimeSpan::seconds(1.0),
            TimeSpan::hours(1.0),
            TimeSpan::hours(24.0),
        ];
        for (volume, gauge, mm, supply) in cases {
            for thermal in [Thermal::Isothermal, Thermal::Adiabatic] {
                let ullage = Ullage::new(
                    Volume::cubic_metres(volume),
                    nitrogen(),
                    ambient + crate::model::Pressure::kilopascals(gauge),
                    ambient,
                )
                .unwrap();
                let hole = Hole::new(Length::millimetres(mm), Length::ZERO).unwrap();
                let b = Blowdown::new(
                    ullage,
                    &hole,
                    DischargeCoefficient::SHARP_EDGED,
                    MassRate::kg_per_second(supply),
                    thermal,
                )
                .unwrap();
                let label =
                    format!("{volume} m³, {gauge} kPa, {mm} mm, {supply} kg/s, {thermal:?}");
                let started = std::time::Instant::now();
                let f = b.forecast(&horizons, &[Mass::kilograms(1.0)]).unwrap();
                assert!(started.elapsed().as_secs_f64() < 2.0, "{label}: slow");
                assert!(
                    matches!(f.end, BlowdownEnd::Steady { .. }),
                    "{label}: {:?}",
                    f.end
                );
                let mut previous = -1.0;
                for p in &f.horizons {
                    let r = p.released.si();
                    assert!(r.is_finite() && r >= previous, "{label}: {p:?}");
                    assert!(p.pressure.si() <= ullage.pressure().si() * (1.0 + 1e-12));
                    previous = r;
                }
                assert_eq!(f.horizons[0].released, Mass::ZERO, "{label}");
            }
        }
    }

    #[test]
    fn radau_coefficients_meet_the_simplifying_conditions() {
        // The 3-stage Radau IIA method satisfies B(5): sum b_i c_i^(q-1) = 1/q
        // for q = 1..5, and C(3): sum_j a_ij c_j^(q-1) = c_i^q / q for
        // q = 1..3 (Hairer and Wanner, section IV.5). With the nodes fixed,
        // C(3) determines A, so a wrong digit in a recalled coefficient
        // breaks one of them.
        let (c, a) = radau_coefficients();
        let b = a[2];
        for q in 1..=5 {
            let sum: f64 = b.iter().zip(&c).map(|(b, c)| b * c.powi(q - 1)).sum();
            assert!((sum - 1.0 / q as f64).abs() < 1e-15, "B({q}): {sum}");
        }
        for i in 0..3 {
            for q in 1..=3 {
                let sum: f64 = (0..3).map(|j| a[i][j] * c[j].powi(q - 1)).sum();
                let want = c[i].powi(q) / q as f64;
                assert!(
                    (sum - want).abs() < 1e-15,
                    "C({q}) row {i}: {sum} vs {want}"
                );
            }
        }
    }

    #[test]
    fn the_linear_solver_solves() {
        // A matrix that needs row exchanges, with a known solution.
        let mut m = [[0.0; 9]; 9];
        let x: [f64; 9] = std::array::from_fn(|i| i as f64 - 3.5);
        for (r, row) in m.iter_mut().enumerate() {
            for (c, v) in row.iter_mut().enumerate() {
                // Small on the diagonal, so that every column pivots.
                *v = if r == c {
                    0.01
                } else {
                    ((r * 9 + c * 4) % 11) as f64 - 5.0
                };
            }
        }
        let b: [f64; 9] = std::array::from_fn(|r| (0..9).map(|c| m[r][c] * x[c]).sum());
        let got = Lu::new(m).unwrap().solve(b);
        for (g, want) in got.iter().zip(x) {
            assert!((g - want).abs() < 1e-13, "{g} vs {want}");
        }
        assert!(Lu::new([[0.0; 9]; 9]).is_none());
    }

    #[test]
    fn the_flow_matches_the_orifice_module() {
        // The blowdown's own form of the nozzle equations against
        // `gas_mass_rate`, choked and subcritical, away from r = 1 where
        // the orifice module's form loses digits.
        let b = case(150.0, 0.0, Thermal::Isothermal);
        let gas = nitrogen();
        let area = Length::millimetres(20.0).circle_area();
        for gauge in [1.0, 10.0, 50.0, 89.0, 91.0, 150.0, 900.0] {
            let p =
                AbsolutePressure::STANDARD_ATMOSPHERE + crate::model::Pressure::kilopascals(gauge);
            let (ours, regime) = b.outflow(p, gas.temperature());
            let (theirs, their_regime) = gas_mass_rate(
                DischargeCoefficient::SHARP_EDGED,
                area,
                p,
                AbsolutePressure::STANDARD_ATMOSPHERE,
                &gas,
            );
            assert_eq!(regime, their_regime, "{gauge} kPa");
            let rel = (ours.si() / theirs.si() - 1.0).abs();
            assert!(rel < 1e-10, "{gauge} kPa: {ours} vs {theirs}");
        }
        // Near ambient the flow tends to the incompressible orifice
        // equation, Cd A sqrt(2 rho dP) (analytic limit of the nozzle
        // equation as dP/p -> 0).
        let dp = 1e-3;
        let p = AbsolutePressure::pascals(101_325.0 + dp);
        let (rate, _) = b.outflow(p, gas.temperature());
        let rho = p.si() * 0.028_01 / (GAS_CONSTANT * gas.temperature().si());
        let orifice = 0.61 * area.si() * (2.0 * rho * dp).sqrt();
        assert!(
            (rate.si() / orifice - 1.0).abs() < 1e-7,
            "{rate} vs {orifice}"
        );
    }

    #[test]
    fn the_isothermal_bound_releases_more_and_takes_longer() {
        // Both start alike; the cooling gas of the adiabatic bound loses
        // pressure faster and keeps more mass at ambient.
        for gauge in [15.0, 400.0] {
            let iso = case(gauge, 0.0, Thermal::Isothermal)
                .forecast(&[TimeSpan::seconds(5.0)], &[])
                .unwrap();
            let adi = case(gauge, 0.0, Thermal::Adiabatic)
                .forecast(&[TimeSpan::seconds(5.0)], &[])
                .unwrap();
            assert_eq!(iso.initial.rate, adi.initial.rate);
            assert!(iso.released_by_end > adi.released_by_end);
            assert!(iso.horizons[0].released >= adi.horizons[0].released);
            let end = |f: &BlowdownForecast| match f.end {
                BlowdownEnd::Ambient { after } => after.si(),
                other => panic!("{other:?}"),
            };
            assert!(end(&iso) > end(&adi), "{gauge} kPa");
        }
    }

    #[test]
    fn a_supply_that_covers_the_outflow_holds_the_pressure() {
        let b = case(15.0, 10.0, Thermal::Adiabatic);
        let f = b
            .forecast(&[TimeSpan::minutes(10.0)], &[Mass::kilograms(1.0)])
            .unwrap();
        assert_eq!(f.end, BlowdownEnd::Held);
        let rate = f.initial.rate.si();
        assert!((f.horizons[0].released.si() - 600.0 * rate).abs() < 1e-9);
        assert_eq!(f.horizons[0].pressure, f.initial.pressure);
        assert!((f.release_times[0].unwrap().si() - 1.0 / rate).abs() < 1e-9);
        assert_eq!(b.steady_pressure(), None);
    }

    #[test]
    fn nothing_flows_from_a_headspace_at_or_below_ambient() {
        for gauge in [0.0, -2.0] {
            let f = case(gauge, 0.0, Thermal::Isothermal)
                .forecast(&[TimeSpan::hours(1.0)], &[Mass::kilograms(1.0)])
                .unwrap();
            assert_eq!(f.end, BlowdownEnd::NoFlow);
            assert_eq!(f.horizons[0].released, Mass::ZERO);
            assert_eq!(f.release_times, vec![None]);
        }
    }

    #[test]
    fn bad_inputs_are_refused() {
        let ambient = AbsolutePressure::STANDARD_ATMOSPHERE;
        let gas = nitrogen();
        for volume in [0.0, -1.0, f64::NAN, 1e9] {
            assert!(Ullage::new(Volume::cubic_metres(volume), gas, ambient, ambient).is_err());
        }
        for pressure in [0.0, f64::INFINITY, 1e9] {
            let p = AbsolutePressure::pascals(pressure);
            assert!(Ullage::new(Volume::cubic_metres(1.0), gas, p, ambient).is_err());
        }
        let ullage = Ullage::new(Volume::cubic_metres(1.0), gas, ambient, ambient).unwrap();
        let hole = Hole::new(Length::millimetres(20.0), Length::ZERO).unwrap();
        let cd = DischargeCoefficient::CONSERVATIVE;
        for supply in [-1.0, f64::NAN, 1e6] {
            let s = MassRate::kg_per_second(supply);
            assert!(Blowdown::new(ullage, &hole, cd, s, Thermal::Isothermal).is_err());
        }
        let b = case(15.0, 0.0, Thermal::Isothermal);
        assert!(b.forecast(&[TimeSpan::seconds(-1.0)], &[]).is_err());
        assert!(b.forecast(&[], &[Mass::kilograms(-1.0)]).is_err());
    }
}
