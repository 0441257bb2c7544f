//! The physics core: how much leaves a tank through a hole, and when it stops.
//!
//! Pure code: no I/O, no clock, no Modbus, no SQL. Everything is in SI units
//! inside, carried by the newtypes in [`units`], and every constructor checks
//! its inputs and says what is wrong rather than panicking.
//!
//! * [`units`]: quantities as newtypes, and the physical constants.
//! * [`geometry`]: tank shapes and calibration tables (volume, level, surface area).
//! * [`orifice`]: the orifice equation for liquid and the ideal-gas nozzle equations.
//! * [`vessel`]: a tank with its contents; pressure readings; which phase flows.
//! * [`density`]: liquid density as a function of temperature.
//! * [`forecast`]: the draining forecast (when the flow stops, totals at horizons).
//! * [`blowdown`]: the gas space venting through a hole above the liquid.
//! * [`tally`]: the running total over timestamped samples, with its Cd band.
//! * [`integral`]: the trapezoid rule as a running accumulator.
//! * [`quadrature`]: adaptive Gauss–Kronrod integration, used by the forecast.

pub mod blowdown;
pub mod density;
pub mod error;
pub mod forecast;
pub mod geometry;
pub mod integral;
pub mod orifice;
pub mod quadrature;
pub mod tally;
pub mod units;
pub mod vessel;

pub use blowdown::{Blowdown, BlowdownEnd, BlowdownForecast, BlowdownPoint, Thermal, Ullage};
pub use density::DensityModel;
pub use error::{ModelError, ModelResult};
pub use forecast::{Forecast, HorizonPoint, forecast_liquid};
pub use geometry::{Geometry, Heads};
pub use integral::Trapezoid;
pub use orifice::{
    DischargeCoefficient, GasProperties, GasRegime, Hole, gas_mass_rate, liquid_mass_rate,
};
pub use tally::{Band, ReleaseTally, TallyFigures};
pub use units::*;
pub use vessel::{Outflow, Phase, PressureReading, PressureTap, TankState, Vessel};
