//! Flow through a hole: the orifice equation for liquid, and the isentropic
//! nozzle equations for an ideal gas, choked or subcritical.
//!
//! These are the bare equations with validated inputs. Which one applies to a
//! tank (liquid if the surface is above the hole, vapour if it is below and
//! the headspace is pressurised) is decided in `vessel`.

use super::error::{ModelError, ModelResult, non_negative, positive, within};
use super::units::{
    AbsolutePressure, Area, Density, GAS_CONSTANT, Length, MassRate, MolarMass, Pressure,
    Temperature,
};

/// A discharge coefficient Cd, from 0.1 to 1.
///
/// Cd is the ratio of the real flow to the ideal, frictionless flow through
/// the same hole. It folds in the contraction of the jet (vena contracta) and
/// friction at the edge.
#[derive(Debug, Clone, Copy, PartialEq, PartialOrd)]
pub struct DischargeCoefficient(f64);

impl DischargeCoefficient {
    /// A sharp-edged, jagged hole such as a corrosion hole or a puncture
    /// (common practice: about 0.61, the classic value for a sharp-edged
    /// orifice).
    pub const SHARP_EDGED: Self = Self(0.61);

    /// No losses at all: the figure for a smooth rounded nozzle, and the
    /// conservative choice when nobody has seen the hole (common practice).
    pub const CONSERVATIVE: Self = Self(1.0);

    /// The lowest accepted. Real holes and nozzles lie between about 0.5
    /// (a re-entrant mouthpiece, from memory) and 1.0; 0.1 leaves room for
    /// a judgement call and keeps the model's figures finite, which a Cd
    /// near zero does not (the fitted hole divides by it).
    pub const MIN: f64 = 0.1;

    pub fn new(cd: f64) -> ModelResult<Self> {
        if cd.is_finite() && (Self::MIN..=1.0).contains(&cd) {
            Ok(Self(cd))
        } else {
            Err(ModelError::DischargeCoefficient(cd))
        }
    }

    pub const fn get(self) -> f64 {
        self.0
    }
}

/// A hole in the tank wall: its diameter and the elevation of its centre
/// above the tank's datum.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Hole {
    diameter: Length,
    elevation: Length,
}

impl Hole {
    /// A round hole. For a hole of another shape, give the diameter of the
    /// circle with the same area.
    pub fn new(diameter: Length, elevation: Length) -> ModelResult<Self> {
        positive("hole diameter", diameter.si(), "m")?;
        // Wider than any tank wall's side: a unit slip (mm for m), and the
        // flow of such a hole is not finite in f64 past about 1e150 m.
        within("hole diameter", diameter.si(), (0.0, 50.0), "m")?;
        non_negative("hole height", elevation.si(), "m")?;
        Ok(Self {
            diameter,
            elevation,
        })
    }

    /// A round hole of the given area (as fitted from data).
    pub fn with_area(area: Area, elevation: Length) -> ModelResult<Self> {
        positive("hole area", area.si(), "m²")?;
        Self::new(area.circle_diameter(), elevation)
    }

    pub fn diameter(&self) -> Length {
        self.diameter
    }

    pub fn elevation(&self) -> Length {
        self.elevation
    }

    pub fn area(&self) -> Area {
        self.diameter.circle_area()
    }
}

/// Liquid mass flow through a hole by the orifice equation,
/// m = Cd A sqrt(2 rho dP), where `driving` is the liquid's gauge pressure at
/// the hole. No flow when the driving pressure is zero or less: the liquid
/// does not flow backwards into a tank.
pub fn liquid_mass_rate(
    cd: DischargeCoefficient,
    area: Area,
    density: Density,
    driving: Pressure,
) -> MassRate {
    let dp = driving.si();
    if dp > 0.0 && dp.is_finite() {
        MassRate::kg_per_second(cd.get() * area.si() * (2.0 * density.si() * dp).sqrt())
    } else {
        MassRate::ZERO
    }
}

/// What an ideal gas needs for the nozzle equations.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct GasProperties {
    molar_mass: MolarMass,
    heat_capacity_ratio: f64,
    temperature: Temperature,
}

impl GasProperties {
    /// `heat_capacity_ratio` is k = cp/cv, which must exceed 1.
    pub fn new(
        molar_mass: MolarMass,
        heat_capacity_ratio: f64,
        temperature: Temperature,
    ) -> ModelResult<Self> {
        // 2 g/mol (hydrogen) to 400 g/mol covers every vapour a tank farm
        // stores; outside that a unit slip (g for kg) is far more likely.
        within("molar mass", molar_mass.si(), (0.002, 0.4), "kg/mol")?;
        let k = heat_capacity_ratio;
        if !(k.is_finite() && k > 1.0 && k <= 1.7) {
            return Err(ModelError::HeatCapacityRatio(k));
        }
        within("gas temperature", temperature.si(), (20.0, 1500.0), "K")?;
        Ok(Self {
            molar_mass,
            heat_capacity_ratio,
            temperature,
        })
    }

    pub fn molar_mass(&self) -> MolarMass {
        self.molar_mass
    }

    pub fn heat_capacity_ratio(&self) -> f64 {
        self.heat_capacity_ratio
    }

    pub fn temperature(&self) -> Temperature {
        self.temperature
    }

    /// The pressure ratio downstream/upstream at and below which the flow is
    /// choked: (2/(k+1))^(k/(k-1)), about 0.528 for air.
    pub fn critical_pressure_ratio(&self) -> f64 {
        let k = self.heat_capacity_ratio;
        (2.0 / (k + 1.0)).powf(k / (k - 1.0))
    }
}

/// Whether a gas jet runs at sonic speed in the hole.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum GasRegime {
    /// Sonic in the hole: the flow no longer depends on the outside pressure.
    Choked,
    /// Below sonic: the outside pressure holds the flow back.
    Subcritical,
}

/// Ideal-gas mass flow through a hole from `upstream` into `downstream`
/// (both absolute), for an isentropic nozzle with discharge coefficient Cd:
///
/// * choked when p_down / p_up <= (2/(k+1))^(k/(k-1)):
///   m = Cd A p_up sqrt(k M / (R T) (2/(k+1))^((k+1)/(k-1)))
/// * otherwise, with r = p_down / p_up:
///   m = Cd A p_up sqrt(2 M / (R T) k/(k-1) (r^(2/k) - r^((k+1)/k)))
///
/// No flow, and `None` for the regime, when the upstream pressure does not
/// exceed the downstream one.
pub fn gas_mass_rate(
    cd: DischargeCoefficient,
    area: Area,
    upstream: AbsolutePressure,
    downstream: AbsolutePressure,
    gas: &GasProperties,
) -> (MassRate, Option<GasRegime>) {
    let (p_up, p_down) = (upstream.si(), downstream.si());
    if !(p_up.is_finite() && p_down.is_finite() && p_up > p_down && p_down >= 0.0) {
        return (MassRate::ZERO, None);
    }
    let k = gas.heat_capacity_ratio;
    let m_over_rt = gas.molar_mass.si() / (GAS_CONSTANT * gas.temperature.si());
    let r = p_down / p_up;
    let (flux_factor, regime) = if r <= gas.critical_pressure_ratio() {
        (
            k * m_over_rt * (2.0 / (k + 1.0)).powf((k + 1.0) / (k - 1.0)),
            GasRegime::Choked,
        )
    } else {
        (
            2.0 * m_over_rt * k / (k - 1.0) * (r.powf(2.0 / k) - r.powf((k + 1.0) / k)),
            GasRegime::Subcritical,
        )
    };
    let rate = cd.get() * area.si() * p_up * flux_factor.max(0.0).sqrt();
    (MassRate::kg_per_second(rate), Some(regime))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cd_outside_its_range_is_refused() {
        for bad in [0.0, 0.05, 1e-308, -0.5, 1.01, f64::NAN, f64::INFINITY] {
            let err = DischargeCoefficient::new(bad).unwrap_err();
            assert!(err.to_string().contains("outside 0.1 to 1"), "{err}");
        }
        assert!(DischargeCoefficient::new(DischargeCoefficient::MIN).is_ok());
        assert_eq!(
            DischargeCoefficient::new(1.0).unwrap(),
            DischargeCoefficient::CONSERVATIVE
        );
    }

    #[test]
    fn holes_need_a_positive_diameter_and_a_height_above_the_datum() {
        assert!(Hole::new(Length::ZERO, Length::ZERO).is_err());
        assert!(Hole::new(Length::millimetres(-3.0), Length::ZERO).is_err());
        assert!(Hole::new(Length::millimetres(10.0), Length::metres(-0.2)).is_err());
        let hole = Hole::new(Length::millimetres(10.0), Length::metres(0.2)).unwrap();
        assert!((hole.area().si() - 7.853_981_633_974_483e-5).abs() < 1e-18);
    }

    #[test]
    fn liquid_rate_matches_the_orifice_equation_by_hand() {
        // Cd 0.61, 25 mm hole, 850 kg/m3, 50 kPa: 0.61 * 4.9087e-4 * sqrt(8.5e7).
        let area = Length::millimetres(25.0).circle_area();
        let rate = liquid_mass_rate(
            DischargeCoefficient::SHARP_EDGED,
            area,
            Density::kg_per_cubic_metre(850.0),
            Pressure::kilopascals(50.0),
        );
        let by_hand = 0.61
            * (std::f64::consts::PI * 0.025 * 0.025 / 4.0)
            * (2.0f64 * 850.0 * 50_000.0).sqrt();
        assert!((rate.si() - by_hand).abs() < 1e-12);
        assert_eq!(
            liquid_mass_rate(
                DischargeCoefficient::SHARP_EDGED,
                area,
                Density::kg_per_cubic_metre(850.0),
                Pressure::pascals(-1.0)
            ),
            MassRate::ZERO
        );
    }

    #[test]
    fn gas_regimes_meet_at_the_critical_ratio() {
        // The two branches must give the same flow at the critical pressure
        // ratio, or a tank venting down through it would see a jump.
        let gas = GasProperties::new(MolarMass::g_per_mol(28.96), 1.4, Temperature::kelvin(300.0))
            .unwrap();
        let down = AbsolutePressure::STANDARD_ATMOSPHERE;
        let rc = gas.critical_pressure_ratio();
        assert!(
            (rc - 0.528_281_787_717_174).abs() < 1e-12,
            "air critical ratio {rc}"
        );
        let area = Area::square_metres(1e-4);
        let cd = DischargeCoefficient::CONSERVATIVE;
        let at = |p: f64| gas_mass_rate(cd, area, AbsolutePressure::pascals(p), down, &gas);
        let p_crit = down.si() / rc;
        let (choked, regime_c) = at(p_crit * (1.0 + 1e-9));
        let (sub, regime_s) = at(p_crit * (1.0 - 1e-9));
        assert_eq!(regime_c, Some(GasRegime::Choked));
        assert_eq!(regime_s, Some(GasRegime::Subcritical));
        assert!(((choked.si() - sub.si()) / choked.si()).abs() < 1e-6);
        assert_eq!(at(down.si()).0, MassRate::ZERO);
        assert_eq!(at(down.si() * 0.9), (MassRate::ZERO, None));
    }

    #[test]
    fn gas_properties_are_checked() {
        let t = Temperature::kelvin(300.0);
        assert!(GasProperties::new(MolarMass::g_per_mol(28.96), 1.0, t).is_err());
        assert!(GasProperties::new(MolarMass::kg_per_mol(28.96), 1.4, t).is_err());
        assert!(
            GasProperties::new(MolarMass::g_per_mol(28.96), 1.4, Temperature::kelvin(-5.0))
                .is_err()
        );
    }
}
