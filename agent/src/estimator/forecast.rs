//! The forecast: the state it is made from (picked by sample time, so that
//! a replay makes it from the same samples as the live run), and the
//! draining forecast or, for vapour, the blowdown made from it.

use super::*;

/// The state a forecast is made from.
#[derive(Debug, Clone, Copy)]
pub(super) struct ForecastInput {
    pub(super) at_ms: i64,
    pub(super) state: TankState,
    /// The hole it drains through (none: no forecast).
    pub(super) hole_cd: Option<(Hole, DischargeCoefficient)>,
    pub(super) vapour: bool,
    /// The best total then, the liquid cap, and the level's uncertainty.
    pub(super) released: f64,
    pub(super) cap: f64,
    pub(super) uncertainty: f64,
}

impl Estimator {
    /// The hole the forecast drains through: the model's, or, once the
    /// level has refuted the model's flow, an effective one that gives the
    /// level's own present rate (none when the level shows no flow).
    pub(super) fn forecast_hole(
        &self,
        unit_rate: f64,
        rate_best: f64,
    ) -> Option<(Hole, DischargeCoefficient)> {
        if !self.level_mode {
            return self.hole_and_cd();
        }
        // The rate here is the level's, shown only where its slope is clear
        // of zero: none shown, nothing to forecast.
        if rate_best <= 0.0 || unit_rate <= 0.0 {
            return None;
        }
        let cd = self.cd;
        let area = Area::square_metres(rate_best / unit_rate / cd.get());
        let hole = Hole::with_area(area, Length::metres(self.params.hole_height_m)).ok()?;
        Some((hole, cd))
    }

    /// The forecast from a picked state. Liquid: the draining forecast to
    /// where the flow stops. Vapour: the isothermal blowdown of the gas
    /// space to ambient with no blanket supply, the bound that releases
    /// the most and lasts longest (`model::blowdown`). `None` when there is
    /// no hole to drain through, or the model cannot make one.
    pub(super) fn make_forecast(&self, input: &ForecastInput) -> Option<ForecastSummary> {
        let (hole, cd) = input.hole_cd?;
        let horizons = [TimeSpan::minutes(15.0), TimeSpan::hours(1.0)];
        let released = input.released;
        let total = |more: Mass| released + more.si();
        if input.vapour {
            let gas = self.vessel.vapour().copied()?;
            let ambient = self.vessel.ambient();
            let f = ullage_volume(&self.vessel, input.state.level)
                .and_then(|v| Ullage::new(v, gas, ambient + input.state.headspace, ambient))
                .and_then(|u| {
                    Blowdown::new(
                        u,
                        &hole,
                        cd,
                        MassRate::kg_per_second(0.0),
                        Thermal::Isothermal,
                    )
                })
                .and_then(|b| b.forecast(&horizons, &[]))
                .ok()?;
            let stops_after_s = match f.end {
                BlowdownEnd::Ambient { after } | BlowdownEnd::Steady { after, .. } => after.si(),
                BlowdownEnd::NoFlow | BlowdownEnd::Held => 0.0,
            };
            return Some(ForecastSummary {
                made_at_ms: input.at_ms,
                stops_after_s,
                stop_level_m: input.state.level.si(),
                total_at_stop_kg: total(f.released_by_end),
                total_in_15_min_kg: total(f.horizons[0].released),
                total_in_1_h_kg: total(f.horizons[1].released),
            });
        }
        let f = forecast_liquid(&self.vessel, &hole, cd, &input.state, &horizons).ok()?;
        // The forecast releases at most the liquid above the hole now, and
        // the total at most what there was at the start plus transfers in:
        // a total already past that is held, not added to.
        let capped = |x: f64| x.min(input.cap.max(released));
        Some(ForecastSummary {
            made_at_ms: input.at_ms,
            stops_after_s: f.stops_after.si(),
            stop_level_m: f.stop_level.si(),
            total_at_stop_kg: capped(total(f.released_by_stop)),
            total_in_15_min_kg: capped(total(f.horizons[0].released)),
            total_in_1_h_kg: capped(total(f.horizons[1].released)),
        })
    }

    /// Whether the cap took off more than the level's own uncertainty: a
    /// best figure a little above the level's, inside its band, is no news.
    pub(super) fn forecast_capped(&self, f: &ForecastSummary) -> bool {
        let Some(input) = self
            .forecast_input
            .filter(|i| i.at_ms == f.made_at_ms && !i.vapour)
        else {
            return false;
        };
        let Some((hole, cd)) = input.hole_cd else {
            return false;
        };
        let horizons = [TimeSpan::minutes(15.0), TimeSpan::hours(1.0)];
        forecast_liquid(&self.vessel, &hole, cd, &input.state, &horizons).is_ok_and(|raw| {
            input.released + raw.released_by_stop.si()
                > input.cap.max(input.released) + input.uncertainty
        })
    }

    /// The liquid mass between a level and the hole, for reports.
    pub fn remaining_above_hole(&self, level: Length) -> Mass {
        self.vessel.liquid_above(level, &self.unit_hole)
    }
}
