//! The event's start: the level at the start time, interpolated from the
//! samples either side of it, or the first sample's with the lead-in to it
//! counted, or the last point before an outage the event began in.

use super::*;

impl Estimator {
    /// Keeps the last good sample before the start.
    pub(super) fn note_before_start(&mut self, sample: &TankSample) {
        let Some(level) = sample.level.value.filter(|_| sample.level.is_good()) else {
            return;
        };
        let height = self.vessel.geometry().height().si();
        if !(0.0..=height).contains(&level) {
            return;
        }
        let headspace = self
            .headspace(sample, level)
            .map_or(self.tank.assumed_headspace.si(), |p| p.si());
        self.before_start = Some(BeforeStart {
            at_ms: sample.at_ms,
            level,
            headspace,
            temperature: self.temperature(sample),
        });
    }

    /// Sets the start: the level at the start time, interpolated from the
    /// samples either side of it when the history has one within the gap
    /// limit before it; otherwise the first sample's, with the lead-in from
    /// the start to it counted at the first sample's rate (and marked as
    /// bridged when longer than the gap limit). When the first sample comes
    /// more than the gap limit after the start (an event opened during an
    /// outage), the start becomes the last point before a gap, which is
    /// bridged and checked against the level like any other.
    pub(super) fn begin(&mut self, first: &Reading) {
        let level_now = first.state.level.si();
        let before = self.before_start.filter(|b| {
            self.start_ms - b.at_ms <= self.gap_limit_ms && first.at_ms > self.start_ms
        });
        let (level, density, headspace) = match before {
            Some(b) => {
                let w = (self.start_ms - b.at_ms) as f64 / (first.at_ms - b.at_ms) as f64;
                let mix = |a: f64, b: f64| a + w * (b - a);
                let temperature = match (b.temperature, first.temperature) {
                    (Some(a), Some(c)) => Some(mix(a, c)),
                    (a, c) => c.or(a),
                };
                (
                    mix(b.level, level_now),
                    self.density_at(temperature),
                    mix(b.headspace, first.state.headspace.si()),
                )
            }
            None => (level_now, first.density, first.state.headspace.si()),
        };
        let g = self.vessel.geometry();
        let mass = density * g.volume_si(level);
        let above =
            (g.volume_si(level) - g.volume_si(self.params.hole_height_m)).max(0.0) * density;
        self.start = Some(Start {
            level,
            mass,
            area: g.area_si(level),
            above_hole: above,
        });
        let lead_ms = first.at_ms - self.start_ms;
        if before.is_some() {
            // The start is a point of the integrals in its own right: the
            // trapezoid then covers the stretch to the first sample, and the
            // inventory starts from the same interpolated level.
            let reading = Reading {
                at_ms: self.start_ms,
                state: TankState {
                    level: Length::metres(level),
                    headspace: Pressure::pascals(headspace),
                },
                density,
                temperature: None,
                transfer: first.transfer,
                held: Held::default(),
            };
            let mut unit = self.unit_outflow(&reading);
            let rates = self.unit_rates(&reading, &mut unit);
            self.per_unit
                .push(self.start_ms, rates, unit.phase == Phase::Liquid);
            let flow = density * first.transfer;
            let _ = self.transferred.push(self.start_ms, flow);
            let _ = self.transferred_magnitude.push(self.start_ms, flow.abs());
            if lead_ms > self.gap_limit_ms {
                self.last = Some(Last {
                    at_ms: self.start_ms,
                    state: reading.state,
                    inventory: 0.0,
                });
            }
        } else if lead_ms > 0 {
            let mut unit = self.unit_outflow(first);
            let rates = self.unit_rates(first, &mut unit);
            let seconds = lead_ms as f64 / 1000.0;
            self.per_unit.add_lead_in(rates, seconds);
            let lead = rates.best * seconds;
            // A liquid lead-in is liquid the level did not see (the bound
            // below allows for it); a vapour one is vapour.
            if unit.phase == Phase::Liquid {
                self.lead_in_per_unit = lead;
            }
            if lead_ms > self.gap_limit_ms {
                self.start_bridged = true;
                self.start_bridge_per_unit = lead;
                self.quality.gaps_bridged += 1;
                self.quality.longest_gap_s =
                    self.quality.longest_gap_s.max(lead_ms as f64 / 1000.0);
            }
        }
    }
}
