//! Suspected loss: a sequential test, on a tank with no event open, of
//! whether its level falls faster than its metered transfers explain.
//!
//! The method is Page's cumulative sum (CUSUM): E. S. Page, "Continuous
//! inspection schemes", Biometrika 41 (1954) 100-115. The samples are
//! gathered into blocks, on two time scales at once
//! ([`LossParams::block_s`], 1 min, for a fast fall, and
//! [`LossParams::slow_block_s`], 10 min, for a slow one); after each block the
//! residual is the volume that left the tank between the previous block's
//! mean and this one's beyond what the transfer meter says went out (and
//! beyond a small allowance for thermal movement and gauge drift), divided
//! by its standard deviation from the gauge noise (estimated from the
//! samples themselves) and the meter's uncertainty. With no loss the
//! residual is about N(0, 1) or below; Page's statistic
//! `S = max(0, S + z - k)` then stays near zero, and a sustained
//! unexplained fall drives it over `h`. The time the run that crossed `h`
//! began (less a block, early rather than late) is where the unexplained
//! fall began: the back-dated start the alert offers for
//! `leak open --since`.
//!
//! Residuals are differences of consecutive block means, so neighbours
//! share a mean and are negatively correlated (-1/2) under pure noise:
//! their sums telescope, and a run of them has the noise of one. That
//! makes the false-alarm rate lower than Page's i.i.d. figure, never
//! higher; the tests check the i.i.d. core against its published average
//! run lengths, and `tests/loss.rs` measures the whole detector on the
//! simulator.
//!
//! Thermal movement: where the tank has a temperature sensor and its
//! substance a density that follows temperature, each volume is taken at
//! the reference density (`V ρ(T) / ρ_ref`, the mass over a fixed
//! density), so a liquid that contracts as it cools loses no inventory.
//!
//! Pure and clock-free: it sees timestamped levels (m), transfer flows
//! (m³/s) and temperatures (K) and nothing else, so the same samples raise the same alert. It
//! leaves out what to do about an alert (the tracker logs and shows it) and
//! any notion of an open event (the caller resets it when one opens).
//! Rejected: Wald's SPRT, which needs the leak's rate as its alternative
//! hypothesis and restarts after every decision; CUSUM is the SPRT
//! restarted at each sample, which is what a watch over an unknown start
//! needs.

use crate::model::density::DensityModel;
use crate::model::geometry::Geometry;
use crate::model::units::{Length, Temperature};

/// The detector's settings, SI.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LossParams {
    /// Samples are averaged over blocks of this long, s, for the fast
    /// chart...
    pub block_s: f64,
    /// ... and of this long for the slow one.
    pub slow_block_s: f64,
    /// Page's reference value `k`, in standard deviations of a block's
    /// residual: the drift the statistic forgives per block.
    pub reference_k: f64,
    /// Page's decision threshold `h`, in standard deviations.
    pub threshold_h: f64,
    /// An unexplained fall this slow is not counted at all (thermal
    /// contraction, gauge drift), m/s of level.
    pub allowance_m_s: f64,
    /// The smallest level noise (standard deviation) assumed, m, whatever
    /// the samples show: a quantised, quiet gauge would otherwise look
    /// perfect.
    pub noise_floor_m: f64,
    /// The transfer meter's standard uncertainty, as a fraction of the
    /// volume it metered.
    pub meter_fraction: f64,
    /// The smallest standard deviation of a residual, m of level, however
    /// many samples the means average: what averaging does not remove (a
    /// thermometer's tenth of a degree steps the thermal correction, a
    /// gauge's counts, noise that is not white).
    pub resolution_m: f64,
}

impl Default for LossParams {
    /// Blocks of one and ten minutes; k = 0.5 and h = 10 (with i.i.d.
    /// residuals, an average run length of about 1.4e5 blocks by
    /// Siegmund's approximation, some 98 days of one-minute blocks per
    /// tank; the block-mean differences telescope, which makes it longer
    /// still); 1 mm/h allowed (a level gauge's zero drifts about 1 mm a
    /// day, and a tank without a thermometer moves a fraction of a
    /// millimetre an hour with the day's temperature: common practice, not
    /// a standard); a 0.5 mm noise floor; a meter good to 1 % (common
    /// practice for process meters; custody meters do 0.25 %).
    fn default() -> Self {
        Self {
            block_s: 60.0,
            slow_block_s: 600.0,
            reference_k: 0.5,
            threshold_h: 10.0,
            allowance_m_s: 0.001 / 3600.0,
            noise_floor_m: 0.0005,
            meter_fraction: 0.01,
            resolution_m: 0.000_3,
        }
    }
}

/// Page's one-sided CUSUM on standardised residuals, alone: `push` a
/// residual, and it says whether the statistic is over the threshold.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Cusum {
    k: f64,
    h: f64,
    statistic: f64,
}

impl Cusum {
    pub fn new(k: f64, h: f64) -> Self {
        Self {
            k,
            h,
            statistic: 0.0,
        }
    }

    /// Takes one residual; true while the statistic is over `h`. The
    /// statistic is held at most at `2 h`, which changes nothing before it
    /// first crosses `h` (so not the run lengths) and lets it come back to
    /// zero within `2 h / k` steps of the fall stopping, however large the
    /// fall was.
    pub fn push(&mut self, z: f64) -> bool {
        if z.is_finite() {
            self.statistic = (self.statistic + z - self.k).clamp(0.0, 2.0 * self.h);
        }
        self.statistic > self.h
    }

    /// The statistic now (0 when there is no evidence of a loss).
    pub fn statistic(&self) -> f64 {
        self.statistic
    }

    pub fn reset(&mut self) {
        self.statistic = 0.0;
    }
}

/// What the detector holds against a tank while its alert stands.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Suspicion {
    /// Where the unexplained fall began, at the latest (a block before
    /// the start of the block the run's first loss was measured from), ms.
    pub since_ms: i64,
    /// When the alert was raised (the end of the block that crossed), ms.
    pub raised_ms: i64,
    /// The unexplained loss since `since_ms`, m³ (the allowance not
    /// taken off): an estimate, not a measurement.
    pub volume_m3: f64,
    /// That loss over its duration, m³/s.
    pub rate_m3_s: f64,
    /// Page's statistic at the latest block, in standard deviations.
    pub statistic: f64,
}

/// A change of the alert, for the log.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Change {
    Raised(Suspicion),
    /// The statistic came back to zero: the fall has been explained.
    Cleared,
}

/// A tank's standing alert, as the page and the metrics show it.
#[derive(Debug, Clone, PartialEq)]
pub struct Standing {
    pub tank: String,
    pub suspicion: Suspicion,
}

/// The suspected losses standing now, in the daemon's memory: the
/// tracker writes, the page and `/metrics` read. Not stored: a restart
/// starts the watch afresh (the log keeps what was raised).
#[derive(Debug, Default)]
pub struct Board {
    standing: std::sync::Mutex<Vec<Standing>>,
    raised: std::sync::atomic::AtomicU64,
}

impl Board {
    /// Sets or clears `tank`'s alert.
    pub fn set(&self, tank: &str, suspicion: Option<Suspicion>) {
        let mut standing = self.standing.lock().unwrap_or_else(|p| p.into_inner());
        let found = standing.iter().position(|s| s.tank == tank);
        match (found, suspicion) {
            (Some(i), Some(suspicion)) => standing[i].suspicion = suspicion,
            (None, Some(suspicion)) => standing.push(Standing {
                tank: tank.to_string(),
                suspicion,
            }),
            (Some(i), None) => {
                standing.remove(i);
            }
            (None, None) => {}
        }
    }

    /// Counts an alert raised.
    pub fn count_raised(&self) {
        self.raised
            .fetch_add(1, std::sync::atomic::Ordering::Relaxed);
    }

    /// The alerts standing now, earliest start first.
    pub fn snapshot(&self) -> Vec<Standing> {
        let mut standing = self
            .standing
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .clone();
        standing.sort_by_key(|s| s.suspicion.since_ms);
        standing
    }

    /// How many alerts were raised since the daemon started.
    pub fn raised_total(&self) -> u64 {
        self.raised.load(std::sync::atomic::Ordering::Relaxed)
    }
}

/// One block being gathered.
#[derive(Debug, Clone, Copy, Default)]
struct Block {
    first_ms: i64,
    last_ms: i64,
    count: u32,
    volume_sum: f64,
    metered_sum: f64,
    level_sum: f64,
    /// Sum of squared successive volume differences (von Neumann's
    /// estimator of the noise, unmoved by a slow trend), m⁶.
    diff_squares: f64,
    last_volume: f64,
}

/// A finished block's means.
#[derive(Debug, Clone, Copy)]
struct Mean {
    /// The block's first sample and its middle, ms.
    first_ms: i64,
    at_ms: i64,
    count: u32,
    volume: f64,
    metered: f64,
    level: f64,
}

/// One time scale of the watch: its blocks, its noise and its chart.
#[derive(Debug, Clone)]
struct Scale {
    block_ms: i64,
    block: Block,
    previous: Option<Mean>,
    /// The pooled noise variance of a volume, m⁶, and its weight in
    /// samples.
    noise_var: f64,
    noise_weight: f64,
    cusum: Cusum,
    /// The block mean where the current run began, and the loss since.
    run: Option<(i64, f64)>,
}

/// What a scale's finished block says: over the threshold or not, and
/// the run behind it.
struct Verdict {
    over: bool,
    since_ms: i64,
    volume_m3: f64,
    at_ms: i64,
    raised_ms: i64,
}

impl Scale {
    fn new(block_s: f64, params: &LossParams) -> Self {
        Self {
            block_ms: (block_s * 1000.0) as i64,
            block: Block::default(),
            previous: None,
            noise_var: 0.0,
            noise_weight: 0.0,
            cusum: Cusum::new(params.reference_k, params.threshold_h),
            run: None,
        }
    }

    /// Adds a sample, finishing the block first when the sample falls
    /// past its end.
    fn push(
        &mut self,
        at_ms: i64,
        level_m: f64,
        volume: f64,
        metered: f64,
        gap: bool,
        finish: &mut dyn FnMut(&mut Scale, Block) -> Option<Verdict>,
    ) -> Option<Verdict> {
        if gap {
            self.block = Block::default();
            self.previous = None;
        }
        let mut verdict = None;
        if self.block.count > 0 && at_ms - self.block.first_ms >= self.block_ms {
            let b = std::mem::take(&mut self.block);
            verdict = finish(self, b);
        }
        let b = &mut self.block;
        if b.count == 0 {
            b.first_ms = at_ms;
        } else {
            b.diff_squares += (volume - b.last_volume).powi(2);
        }
        b.count += 1;
        b.last_ms = at_ms;
        b.last_volume = volume;
        b.volume_sum += volume;
        b.metered_sum += metered;
        b.level_sum += level_m;
        verdict
    }
}

/// The watch over one tank: the same CUSUM on two time scales, blocks of
/// [`LossParams::block_s`] for a fast fall and of
/// [`LossParams::slow_block_s`] for a slow one (the smallest rate a scale
/// sees falls as its block grows, by `k` times the noise of a mean of its
/// samples over its length), an alert standing while either is over.
#[derive(Debug, Clone)]
pub struct Detector {
    params: LossParams,
    geometry: Geometry,
    density: DensityModel,
    scales: [Scale; 2],
    /// The cumulative metered net flow into the tank, m³, by trapezoids.
    metered: f64,
    last: Option<(i64, f64)>,
    /// The first sample since the start or the last gap: no start is
    /// offered before it (`leak open --since` needs logged samples).
    seen_from_ms: i64,
    alert: Option<Suspicion>,
}

impl Detector {
    /// The watch over a tank of this shape; `density` says how its
    /// contents' density follows temperature (a constant: no correction).
    pub fn new(geometry: Geometry, density: DensityModel, params: LossParams) -> Self {
        Self {
            params,
            geometry,
            density,
            scales: [
                Scale::new(params.block_s, &params),
                Scale::new(params.slow_block_s, &params),
            ],
            metered: 0.0,
            last: None,
            seen_from_ms: i64::MIN,
            alert: None,
        }
    }

    /// The alert standing now, if any.
    pub fn alert(&self) -> Option<&Suspicion> {
        self.alert.as_ref()
    }

    /// Page's statistic now, the larger of the two scales', in standard
    /// deviations.
    pub fn statistic(&self) -> f64 {
        self.scales
            .iter()
            .map(|s| s.cusum.statistic())
            .fold(0.0, f64::max)
    }

    /// Forgets everything (an event opened or closed on the tank).
    pub fn reset(&mut self) {
        *self = Self::new(self.geometry.clone(), self.density.clone(), self.params);
    }

    /// Takes one good level sample (m), the net metered flow into the
    /// tank (m³/s; `None` when the tank has no meter, which counts as no
    /// transfer) and the liquid's temperature (K; `None` without a good
    /// reading: no thermal correction for the sample). Samples must come
    /// in time order; one out of order is ignored, and a gap longer than
    /// the fast block starts the blocks afresh (the statistics and any
    /// alert are kept).
    pub fn push(
        &mut self,
        at_ms: i64,
        level_m: f64,
        transfer_m3_s: Option<f64>,
        temperature_k: Option<f64>,
    ) -> Option<Change> {
        let flow = transfer_m3_s.filter(|f| f.is_finite()).unwrap_or(0.0);
        if !level_m.is_finite() {
            return None;
        }
        let Ok(volume) = self.geometry.volume(Length::from_si(level_m)) else {
            return None;
        };
        let temperature = temperature_k
            .filter(|t| t.is_finite())
            .map(Temperature::from_si);
        let volume =
            volume.si() * self.density.at(temperature).si() / self.density.reference().si();
        let mut gap = false;
        if let Some((last_ms, last_flow)) = self.last {
            if at_ms <= last_ms {
                return None;
            }
            gap = at_ms - last_ms > self.scales[0].block_ms;
            if gap {
                self.seen_from_ms = at_ms;
            } else {
                self.metered += 0.5 * (last_flow + flow) * (at_ms - last_ms) as f64 / 1000.0;
            }
        } else {
            self.seen_from_ms = at_ms;
        }
        self.last = Some((at_ms, flow));
        let (params, geometry, metered) = (self.params, &self.geometry, self.metered);
        let mut finish = |scale: &mut Scale, b: Block| finish_block(&params, geometry, scale, b);
        let mut verdicts = [None, None];
        for (scale, verdict) in self.scales.iter_mut().zip(verdicts.iter_mut()) {
            *verdict = scale.push(at_ms, level_m, volume, metered, gap, &mut finish);
        }
        if verdicts.iter().all(Option::is_none) {
            return None;
        }
        self.judge(verdicts)
    }

    /// The alert's change after one or both scales finished a block.
    fn judge(&mut self, mut verdicts: [Option<Verdict>; 2]) -> Option<Change> {
        let statistic = self.statistic();
        for v in verdicts.iter_mut().flatten() {
            v.since_ms = v.since_ms.max(self.seen_from_ms);
        }
        // The earliest run over the threshold is the one offered.
        let over = verdicts
            .iter()
            .flatten()
            .filter(|v| v.over)
            .min_by_key(|v| v.since_ms);
        match (over, self.alert.as_mut()) {
            (Some(v), None) => {
                let span = (v.at_ms - v.since_ms) as f64 / 1000.0;
                let suspicion = Suspicion {
                    since_ms: v.since_ms,
                    raised_ms: v.raised_ms,
                    volume_m3: v.volume_m3,
                    rate_m3_s: if span > 0.0 { v.volume_m3 / span } else { 0.0 },
                    statistic,
                };
                self.alert = Some(suspicion);
                Some(Change::Raised(suspicion))
            }
            (Some(v), Some(alert)) => {
                // Kept up to date: the start offered stays the earliest.
                if v.since_ms <= alert.since_ms {
                    let span = (v.at_ms - v.since_ms) as f64 / 1000.0;
                    alert.since_ms = v.since_ms;
                    alert.volume_m3 = v.volume_m3;
                    alert.rate_m3_s = if span > 0.0 { v.volume_m3 / span } else { 0.0 };
                }
                alert.statistic = statistic;
                None
            }
            (None, Some(_)) if statistic == 0.0 => {
                self.alert = None;
                Some(Change::Cleared)
            }
            (None, Some(alert)) => {
                alert.statistic = statistic;
                None
            }
            (None, None) => None,
        }
    }
}

/// Ends a scale's block: its residual against the previous block and
/// Page's step.
fn finish_block(
    params: &LossParams,
    geometry: &Geometry,
    scale: &mut Scale,
    b: Block,
) -> Option<Verdict> {
    let n = f64::from(b.count);
    if b.count >= 2 {
        // Pooled over blocks, weighted by their samples (n - 1 each), over
        // about the last hour.
        let var = b.diff_squares / (2.0 * (n - 1.0));
        scale.noise_var = (scale.noise_var * scale.noise_weight + var * (n - 1.0))
            / (scale.noise_weight + n - 1.0);
        scale.noise_weight = (scale.noise_weight + n - 1.0).min(3600.0);
    }
    let mean = Mean {
        first_ms: b.first_ms,
        at_ms: (b.first_ms + b.last_ms) / 2,
        count: b.count,
        volume: b.volume_sum / n,
        metered: b.metered_sum / n,
        level: b.level_sum / n,
    };
    let previous = scale.previous.replace(mean)?;
    let dt = (mean.at_ms - previous.at_ms) as f64 / 1000.0;
    let area = geometry
        .surface_area(Length::from_si(mean.level))
        .map(|a| a.si())
        .unwrap_or(0.0);
    if area <= 0.0 || dt <= 0.0 {
        return None;
    }
    // Net metered into the tank between the two means, less what the
    // level shows came in: what left unmetered.
    let metered = mean.metered - previous.metered;
    let loss = metered - (mean.volume - previous.volume);
    let sigma = scale.noise_var.sqrt().max(area * params.noise_floor_m);
    let mean_sd = sigma * (1.0 / f64::from(mean.count) + 1.0 / f64::from(previous.count)).sqrt();
    let sd = (mean_sd.powi(2) + (params.meter_fraction * metered).powi(2)).sqrt();
    let sd = sd.max(area * params.resolution_m);
    let z = (loss - params.allowance_m_s * dt * area) / sd;
    let was_zero = scale.cusum.statistic() == 0.0;
    let over = scale.cusum.push(z);
    if scale.cusum.statistic() == 0.0 {
        scale.run = None;
    } else if was_zero || scale.run.is_none() {
        // The loss showed against the previous block's mean, so it may
        // have begun anywhere from that block's start; and noise may have
        // brought the statistic to zero once after the fall began. So the
        // start is offered one more block earlier: early rather than late
        // (an early start costs the level's figures a little noise; a late
        // one misses what left).
        scale.run = Some((previous.first_ms - scale.block_ms, loss));
    } else if let Some((_, total)) = scale.run.as_mut() {
        *total += loss;
    }
    let (since_ms, volume_m3) = scale
        .run
        .unwrap_or((previous.first_ms - scale.block_ms, loss));
    Some(Verdict {
        over,
        since_ms,
        volume_m3,
        at_ms: mean.at_ms,
        raised_ms: b.last_ms,
    })
}

#[cfg(test)]
mod tests {

    use super::*;
    use crate::model::units::Density;

    /// splitmix64 (Steele, Lea and Flood, OOPSLA 2014) and Box-Muller,
    /// for seeded standard normals.
    struct Normals(u64);

    impl Normals {
        fn unit(&mut self) -> f64 {
            self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
            let mut z = self.0;
            z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
            z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
            (((z ^ (z >> 31)) >> 11) as f64 + 0.5) / (1u64 << 53) as f64
        }
        fn next(&mut self) -> f64 {
            let (u, v) = (self.unit(), self.unit());
            (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
        }
    }

    fn mean_run_length(k: f64, h: f64, shift: f64, runs: u32, seed: u64) -> f64 {
        let mut normals = Normals(seed);
        let mut total = 0u64;
        for _ in 0..runs {
            let mut cusum = Cusum::new(k, h);
            let mut steps = 0u64;
            loop {
                steps += 1;
                if cusum.push(shift + normals.next()) {
                    break;
                }
            }
            total += steps;
        }
        total as f64 / f64::from(runs)
    }

    #[test]
    fn in_control_run_length_matches_the_published_value() {
        // One-sided CUSUM, k = 0.5, h = 4, N(0, 1) residuals: ARL0 = 336,
        // by the Markov-chain method of D. Brook and D. A. Evans, "An
        // approach to the probability distribution of CUSUM run length",
        // Biometrika 59 (1972) 539-549 (Siegmund's approximation gives
        // 338). 4000 runs: the mean's standard error is about 5.3.
        let arl = mean_run_length(0.5, 4.0, 0.0, 4000, 17);
        assert!((arl - 336.0).abs() < 0.05 * 336.0, "ARL0 {arl}");
    }

    #[test]
    fn out_of_control_run_length_matches_the_published_value() {
        // The same chart after a one-sigma shift: ARL1 = 8.38 (Brook and
        // Evans, as above).
        let arl = mean_run_length(0.5, 4.0, 1.0, 20_000, 29);
        assert!((arl - 8.38).abs() < 0.03 * 8.38, "ARL1 {arl}");
    }

    #[test]
    fn a_constant_residual_crosses_when_counted_by_hand() {
        // z = 2, k = 0.5: S grows by 1.5 a step, 1.5, 3.0, 4.5 > 4.
        let mut cusum = Cusum::new(0.5, 4.0);
        assert!(!cusum.push(2.0));
        assert!(!cusum.push(2.0));
        assert!(cusum.push(2.0));
        // Negative residuals floor it at zero.
        cusum.reset();
        assert!(!cusum.push(-10.0));
        assert_eq!(cusum.statistic(), 0.0);
    }

    fn tank() -> Geometry {
        // 4 m across: 12.566 m² of surface at every level.
        Geometry::vertical_cylinder(Length::from_si(4.0), Length::from_si(10.0)).unwrap()
    }

    /// The defaults without the allowance and the resolution, so the
    /// noise floor alone sets a residual's spread.
    fn params() -> LossParams {
        LossParams {
            allowance_m_s: 0.0,
            resolution_m: 0.0,
            ..LossParams::default()
        }
    }

    #[test]
    fn a_steady_fall_is_detected_when_computed_by_hand() {
        // A noiseless level at 1 Hz falling 0.36 mm a minute from t = 0,
        // on a floor of 0.5 mm: 60-sample blocks, block means 60 s apart,
        // each residual's standard deviation 0.5 mm * sqrt(2/60) =
        // 0.0913 mm, so z = 0.36 / 0.0913 = 3.944 a block, 3.444 over k.
        // S after the 1st, 2nd, 3rd block's comparison: 3.44, 6.89,
        // 10.33 > 10. Block 0 is the reference, so the 3rd comparison ends
        // with block 3, which closes when the sample at t = 240 s arrives.
        let mut d = Detector::new(
            tank(),
            DensityModel::Constant(Density::from_si(840.0)),
            params(),
        );
        let rate = 0.000_36 / 60.0;
        let mut raised = None;
        for s in 0..600i64 {
            if let Some(Change::Raised(a)) = d.push(s * 1000, 5.0 - rate * s as f64, None, None) {
                raised = Some((s, a));
                break;
            }
        }
        let (at, a) = raised.expect("raised");
        assert_eq!(at, 240);
        // Since a block before the start of block 0, the first loss's
        // reference; but never before the first sample.
        assert_eq!(a.since_ms, 0);
        assert_eq!(a.raised_ms, 239_000);
        let expected = 12.566_370_614 * rate * 180.0;
        assert!(
            (a.volume_m3 - expected).abs() < 1e-6 * expected.max(1.0),
            "{a:?}"
        );
    }

    #[test]
    fn metered_outflow_explains_a_fall() {
        // 36 m³/h out of the 12.566 m² tank: the level falls 0.796 mm/s,
        // which the meter explains exactly; no alert in a day.
        let mut d = Detector::new(
            tank(),
            DensityModel::Constant(Density::from_si(840.0)),
            params(),
        );
        let flow = -0.01;
        let area = 12.566_370_614_359_172;
        for s in 0..3600i64 {
            let level = 8.0 + flow * s as f64 / area;
            assert_eq!(d.push(s * 1000, level, Some(flow), None), None, "at {s}");
        }
        assert_eq!(d.statistic(), 0.0);
    }

    #[test]
    fn noise_alone_raises_nothing_and_a_cleared_fall_says_so() {
        let mut d = Detector::new(
            tank(),
            DensityModel::Constant(Density::from_si(840.0)),
            params(),
        );
        let mut normals = Normals(3);
        for s in 0..86_400i64 {
            let level = 5.0 + 0.002 * normals.next();
            assert_eq!(d.push(s * 1000, level, None, None), None, "at {s}");
        }
        // Now a fall of 5 mm a minute for ten minutes, then steady: each
        // statistic is held at 2 h = 20 and loses k = 0.5 a block after, so
        // both are back at zero 40 slow blocks (6.7 h) later.
        let mut changes = Vec::new();
        let mut level = 5.0;
        for s in 86_400..86_400 + 8 * 3600i64 {
            if s < 87_000 {
                level -= 0.005 / 60.0;
            }
            if let Some(c) = d.push(s * 1000, level + 0.002 * normals.next(), None, None) {
                changes.push((s, c));
            }
        }
        let Change::Raised(a) = changes[0].1 else {
            panic!("{changes:?}");
        };
        // Back-dated to at or a little before the fall began (the run may
        // start on a noisy block before it), and found within 2 blocks.
        assert!(a.since_ms <= 86_430_000 && a.since_ms > 86_200_000, "{a:?}");
        assert!(changes[0].0 <= 86_400 + 180, "{changes:?}");
        assert_eq!(changes.len(), 2, "{changes:?}");
        assert!(
            matches!(changes.last().unwrap().1, Change::Cleared),
            "{changes:?}"
        );
    }

    #[test]
    fn a_cooling_liquid_loses_no_inventory() {
        // 8 m of a liquid expanding 0.001 per K cools 5 K in an hour: the
        // level falls 40 mm, far past the allowance, and no mass leaves.
        let density =
            DensityModel::expansion(Density::from_si(840.0), Temperature::from_si(288.15), 0.001)
                .unwrap();
        let mut corrected = Detector::new(tank(), density, params());
        let mut plain = Detector::new(
            tank(),
            DensityModel::Constant(Density::from_si(840.0)),
            params(),
        );
        let mut plain_raised = false;
        for s in 0..3600i64 {
            let temperature = 288.15 - 5.0 * s as f64 / 3600.0;
            let level = 8.0 * (1.0 + 0.001 * (temperature - 288.15));
            assert_eq!(
                corrected.push(s * 1000, level, None, Some(temperature)),
                None
            );
            plain_raised |= plain.push(s * 1000, level, None, None).is_some();
        }
        assert!(
            plain_raised,
            "without the temperature the fall looks like a loss"
        );
        assert_eq!(corrected.statistic(), 0.0);
    }

    #[test]
    fn a_gap_restarts_the_blocks() {
        let mut d = Detector::new(
            tank(),
            DensityModel::Constant(Density::from_si(840.0)),
            params(),
        );
        for s in 0..120i64 {
            d.push(s * 1000, 5.0, None, None);
        }
        // An hour later, a metre lower (a transfer not metered while the
        // agent was down): not compared across the gap.
        for s in 3720..3900i64 {
            assert_eq!(d.push(s * 1000, 4.0, None, None), None);
        }
        assert_eq!(d.statistic(), 0.0);
    }
}
