//! Gaps in the data: when one is long enough to be bridged, the bridge by
//! the draining forecast held to what the level on the far side shows, and
//! the rejection of a level that jumps further than the tank can move.

use super::*;

impl Estimator {
    /// When a gap ends at `at_ms`: its length and the state before it.
    pub(super) fn gap_before(&mut self, at_ms: i64) -> Option<(i64, Last)> {
        let last = self.last?;
        let gap_ms = at_ms - last.at_ms;
        if gap_ms <= self.gap_limit_ms {
            return None;
        }
        self.quality.gaps_bridged += 1;
        self.quality.longest_gap_s = self.quality.longest_gap_s.max(gap_ms as f64 / 1000.0);
        Some((gap_ms, last))
    }

    /// Bridges a gap with the draining forecast from the state before it,
    /// bounded by what the level on the far side says left the tank across
    /// the gap (`seen`, kg), with the accuracy and noise of the readings
    /// either side of it. The bridge goes in per unit Cd·A, so that every
    /// figure and band scales with it.
    pub(super) fn bridge(&mut self, gap_ms: i64, before: &Last, seen: f64, after: &Reading) {
        let Some((hole, cd)) = self.hole_and_cd() else {
            return;
        };
        let k = hole.area().si() * cd.get();
        let gap = TimeSpan::seconds(gap_ms as f64 / 1000.0);
        let Ok(f) = forecast_liquid(&self.vessel, &hole, cd, &before.state, &[gap]) else {
            return;
        };
        let forecast = f.horizons[0].released.si() * after.density / self.vessel.density().si();
        let liquid = before.state.level.si() > self.params.hole_height_m;
        let bridged = if liquid {
            let g = self.vessel.geometry();
            let (a0, a1) = (
                g.area_si(before.state.level.si()),
                g.area_si(after.state.level.si()),
            );
            let u_level = quad(self.standard.level, self.level_noise());
            let allowance = COVERAGE_FACTOR * after.density * quad(a0, a1) * u_level;
            if (forecast - seen).abs() <= allowance {
                forecast
            } else {
                // The level refutes the forecast across the gap (the flow
                // stopped, slowed or grew in it): what the level shows is the
                // bridge, with the level's uncertainty on it.
                let measured = seen.max(0.0);
                if measured < forecast {
                    self.quality.bridge_cut_kg += forecast - measured;
                }
                self.bridge_uncertainty_kg = quad(self.bridge_uncertainty_kg, allowance);
                measured
            }
        } else {
            forecast
        };
        self.bridged_kg += bridged;
        self.quality.bridged_kg += bridged;
        self.per_unit.add_bridge(bridged / k);
    }

    /// Whether a level jumps too far from the last one used to be real: a
    /// radar echo lost for one poll, a glitch in the loop. A jump is kept
    /// back and accepted only when the next reading confirms it (a real step,
    /// such as a gauge re-zeroed). The limit is SPIKE_NOISE_MULTIPLE times
    /// the level noise, and never under SPIKE_FLOOR_M, per second elapsed.
    pub(super) fn is_spike(&mut self, at_ms: i64, level: f64) -> bool {
        let Some(last) = self.last else { return false };
        // Per second of time since the last sample: after a gap the level
        // has had time to move.
        let seconds = ((at_ms - last.at_ms) as f64 / 1000.0).max(1.0);
        let limit = (SPIKE_NOISE_MULTIPLE * self.level_noise()).max(SPIKE_FLOOR_M) * seconds;
        if (level - last.state.level.si()).abs() <= limit {
            self.pending_jump = None;
            return false;
        }
        match self.pending_jump.replace(level) {
            Some(previous) if (previous - level).abs() <= limit => {
                self.pending_jump = None;
                false
            }
            _ => true,
        }
    }
}
