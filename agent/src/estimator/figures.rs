//! The figures after a sample: the three views (the orifice model with the
//! given or fitted hole, the inventory balance), held to what the level
//! allows, the ratchet and its recorded revisions, the crossings, the
//! warnings, and the whole estimate kept for `Estimator::estimate`.

use super::*;

/// The level's rate while no loss is seen: its slope only where the slope
/// is clear of zero by its own two-sigma band (a leak that has just begun),
/// else no flow; the high end is what the level cannot rule out.
pub(super) fn significant_rate((low, best, high): (f64, f64, f64)) -> (f64, f64, f64) {
    if low > 0.0 {
        (0.0, best, high)
    } else {
        (0.0, 0.0, high)
    }
}

/// Whether an implied Cd's band overlaps the Cd range.
pub(super) fn c_overlaps(low: f64, high: f64, range_low: f64, range_high: f64) -> bool {
    low <= range_high && high >= range_low
}

/// A figure's three values: low, best, high.
type Triple = (f64, f64, f64);

/// What one view of the release gives before the level holds it: the
/// method and why, the released total and the present rate (each low,
/// best, high), and the orifice model's best total, when a hole is known.
struct View {
    method: Method,
    reason: Reason,
    released: Triple,
    rate: Triple,
    model: Option<f64>,
}

/// How the per-unit integral splits between liquid (which the level
/// checks) and vapour (which it cannot).
#[derive(Clone, Copy)]
struct Shares {
    /// The vapour part per unit Cd·A; zero when it is round-off.
    vapour_part: f64,
    /// The liquid share of the whole, 0 to 1.
    liquid_share: f64,
}

impl Estimator {
    /// The figures after a sample, from its reading, the flow through the
    /// unit hole, the rate's relative band, the inventory balance, and
    /// where the gap before it (if any) began. In order: the level's
    /// uncertainty, the view (given hole, fitted hole or the level alone),
    /// the level's hold on it, the ratchet, the crossings, the warnings and
    /// the forecast's schedule.
    pub(super) fn compute(
        &mut self,
        r: &Reading,
        unit: Outflow,
        rates: UnitRates,
        inventory: f64,
        gap_from: Option<i64>,
    ) -> Figures {
        let after_gap = gap_from.is_some();
        // The level's own figure is the inventory at this sample, with its
        // full noise: a line smoothed over the last minute would be less
        // noisy, but at a kink (a leak that stops) it runs on past the
        // truth, which is just when the band must hold. The smoothed line
        // serves for the inventory's rate, and for its best figure when
        // nothing else has one (it is less noisy there, and held inside the
        // band): `level_line`, made only where a figure uses it.
        let squares = self.inventory_squares(r, inventory);
        let u = squares.combined();
        let mut band = BandCauses {
            cd_low: self.cd_band.0,
            cd_high: self.cd_band.1,
            inventory_kg: u,
            rate_fraction: rates.fraction(),
            bridge_kg: self.bridge_uncertainty_kg,
            // The causes one by one are written when the whole estimate is
            // asked for.
            ..BandCauses::default()
        };
        // A loss is seen once the level has fallen beyond what the
        // instruments allow, and stays seen for the rest of the revision: a
        // reading that dips back inside the noise does not unsee it.
        self.loss_seen |= inventory > u;
        let loss_seen = self.loss_seen;
        let mut warnings = Warnings::default();
        let fit = self.fit_ready();
        let cap = self.liquid_cap(inventory, u, &mut warnings);
        let shares = self.shares();
        let area_given = self.area_given;
        let view = self.view(area_given, fit, inventory, u, rates, &mut band);
        let (model, method) = (view.model, view.method);
        // Whether the level can speak for the figure at all: not when all
        // of it is vapour. With no hole to go on, a level that has not
        // fallen beyond the instruments is all there is: no loss, no flow.
        // (A hole someone has seen is evidence of its own: its figure stands
        // until the level refutes it.)
        let level_sees = model.is_none() || shares.liquid_share > 0.0;
        let no_loss = model.is_none() && !loss_seen;
        let (released, rate, mut reason, entered_level_mode) =
            self.hold_to_level(view, inventory, u, cap, shares, &mut band, &mut warnings);
        // (All vapour: the liquid cap does not apply, and the level cannot
        // check the figure.)
        if shares.vapour_part > 0.0 || matches!(unit.phase, Phase::Vapour(_)) {
            warnings.insert(Warning::VapourNotChecked);
            if matches!(unit.phase, Phase::Vapour(_)) && model.is_some() {
                reason = Reason::Vapour;
            }
        }
        let (low, best, high) = released;
        if self.start_bridged && self.per_unit.all() > 0.0 {
            // The lead-in's share of the model, at the figure shown.
            let share = self.start_bridge_per_unit / self.per_unit.all();
            self.quality.bridged_kg = self.bridged_kg + share * best.max(0.0);
        }
        let (low, best, high) = self.ratchet(
            (low.max(0.0), best, high),
            u,
            no_loss,
            after_gap || entered_level_mode,
        );
        self.note_crossings(r.at_ms, best, high, no_loss, gap_from);

        // The fit's band and the implied Cd are made when the whole estimate
        // is asked for (`Estimator::estimate`), from what they rest on.
        self.fit_inputs = FitInputs {
            fit,
            inventory,
            u,
            area_given,
            loss_seen,
        };
        if let (Some(area), Some((k, _))) = (area_given, fit) {
            let ratio = self.cd.get() * area / k;
            if !(1.0 / CONSISTENCY_RATIO..=CONSISTENCY_RATIO).contains(&ratio) {
                warnings.insert(Warning::HoleInconsistent);
            }
        }
        if level_sees && !loss_seen {
            warnings.insert(Warning::NoLossSeen);
        }
        self.standing_warnings(r, best, &mut warnings);
        self.schedule_forecast(r, &unit, entered_level_mode, rate.1, best, cap, u);

        let (rate_low, rate_best, rate_high) = rate;
        let figures = Figures {
            at_ms: r.at_ms,
            released_best_kg: best,
            released_low_kg: low,
            released_high_kg: high,
            rate_best_kg_s: rate_best.max(0.0),
            rate_low_kg_s: rate_low.clamp(0.0, rate_best.max(0.0)),
            rate_high_kg_s: rate_high.max(rate_best).max(0.0),
            inventory_kg: Some(inventory),
            model_kg: model,
            method,
            reason,
            phase: match unit.phase {
                Phase::Liquid => PhaseName::Liquid,
                Phase::Vapour(_) => PhaseName::Vapour,
                Phase::None => PhaseName::None,
            },
            after_gap,
            warnings,
        };
        self.latest = Some(Latest {
            figures,
            band,
            squares,
            state: r.state,
            density: r.density,
            temperature: r.temperature,
            choked: match unit.phase {
                Phase::Vapour(regime) => Some(regime == crate::model::GasRegime::Choked),
                _ => None,
            },
            quality: self.quality,
        });
        figures
    }

    /// What the level lets through: the liquid above the hole at the
    /// start plus what was pumped in; nothing can release more liquid. A
    /// level that fell further than that, beyond its own uncertainty, says
    /// the hole is lower than given (or the gauge is wrong): the cap rests
    /// on an assumption the measurement refutes, so it is dropped (and
    /// said) and the figures follow the level.
    fn liquid_cap(&self, inventory: f64, u: f64, warnings: &mut Warnings) -> f64 {
        let start = self.start.expect("set by begin");
        let cap = start.above_hole + self.transferred.total().max(0.0);
        if inventory - u > cap {
            warnings.insert(Warning::HoleHeightRefuted);
            f64::INFINITY
        } else {
            cap
        }
    }

    /// The per-unit integrals, split into the liquid part (which the
    /// level checks) and the vapour part (which it cannot).
    fn shares(&self) -> Shares {
        let pu = &self.per_unit;
        // A liquid lead-in before the first level is liquid too, though the
        // level did not see it: it belongs to the liquid share, never to the
        // vapour part, or it would be counted twice.
        let liquid_part = pu.liquid() + self.lead_in_per_unit;
        // (Relative to the whole: the two sums add in different orders.)
        let vapour_part = (pu.all() - liquid_part).max(0.0);
        let vapour_part = if vapour_part > 1e-9 * pu.all() {
            vapour_part
        } else {
            0.0
        };
        let liquid_share = if pu.all() > 0.0 {
            (liquid_part / pu.all()).min(1.0)
        } else {
            1.0
        };
        Shares {
            vapour_part,
            liquid_share,
        }
    }

    /// The view the figures come from: the orifice model with the given
    /// hole; else the fitted hole, once a loss is seen and the fit is
    /// ready; else the inventory balance alone.
    #[allow(clippy::too_many_arguments)]
    fn view(
        &self,
        area_given: Option<f64>,
        fit: Option<(f64, f64)>,
        inventory: f64,
        u: f64,
        rates: UnitRates,
        band: &mut BandCauses,
    ) -> View {
        let pu = &self.per_unit;
        let (cd_low, cd_high) = self.cd_band;
        let cd = self.cd.get();
        match (area_given, fit) {
            (Some(area), _) => {
                let model = (
                    cd_low * area * pu.low(),
                    cd * area * pu.all(),
                    cd_high * area * pu.high(),
                );
                View {
                    method: Method::OrificeGivenHole,
                    reason: Reason::GivenHole,
                    released: model,
                    rate: (
                        cd_low * area * rates.low,
                        cd * area * rates.best,
                        cd_high * area * rates.high,
                    ),
                    model: Some(model.1),
                }
            }
            (None, Some((k, se))) if self.loss_seen => {
                let total = k * pu.all();
                let spread = COVERAGE_FACTOR * se * pu.all();
                let half = quad(spread, u);
                band.fit_fraction = Some(COVERAGE_FACTOR * se / k);
                let k_low = (k - COVERAGE_FACTOR * se).max(0.0);
                let k_high = k + COVERAGE_FACTOR * se;
                View {
                    method: Method::FittedHole,
                    reason: Reason::FittedHole,
                    released: ((total - half).max(0.0), total, total + half),
                    rate: (k_low * rates.low, k * rates.best, k_high * rates.high),
                    model: Some(total),
                }
            }
            (None, _) => {
                let (smoothed, inventory_rate) = self.level_line(inventory, u);
                let (level_low, level_high) = (inventory - u, inventory + u);
                View {
                    method: Method::InventoryBalance,
                    reason: if self.loss_seen {
                        Reason::NotEnoughDrop
                    } else {
                        Reason::NoLossSeen
                    },
                    released: (level_low.max(0.0), smoothed.max(0.0), level_high.max(0.0)),
                    rate: inventory_rate,
                    model: None,
                }
            }
        }
    }

    /// Holds the model's liquid part to what the level allows, and to the
    /// liquid there was above the hole: a liquid cannot leave without
    /// the level showing it. The level is a measurement; a hole size and
    /// a Cd are assumptions, and a model run on a wrong one (a hole that
    /// was plugged in a data gap, a leak that slowed, a guess at the
    /// size) does not know it is wrong. So the band of the liquid
    /// figure is what the level allows (the inventory balance with its
    /// uncertainty), and the model sets the best figure within it: its
    /// own, as far as the level allows, while their bands overlap; the
    /// level's, when they do not (the model is refuted). The model's own
    /// band is kept beside it (`band.model_*`). A fitted hole's band is
    /// the fit's spread combined with the level's, so never narrower.
    /// The lead-in before the first level is the model's alone (the
    /// inventory starts after it), so the bound allows for it. Returns the
    /// released total and the rate (low, best, high), the reason, and
    /// whether the level refuted the model for the first time here.
    #[allow(clippy::too_many_arguments)]
    fn hold_to_level(
        &mut self,
        view: View,
        inventory: f64,
        u: f64,
        cap: f64,
        shares: Shares,
        band: &mut BandCauses,
        warnings: &mut Warnings,
    ) -> (Triple, Triple, Reason, bool) {
        let View {
            method,
            mut reason,
            released: (mut low, mut best, mut high),
            mut rate,
            model,
        } = view;
        let Shares { liquid_share, .. } = shares;
        let no_loss = model.is_none() && !self.loss_seen;
        let mut entered_level_mode = false;
        if let Some(model_best) = model.filter(|_| liquid_share > 0.0) {
            let k_used = if self.per_unit.all() > 0.0 {
                model_best / self.per_unit.all()
            } else {
                0.0
            };
            let lead_in = k_used * self.lead_in_per_unit;
            let centre = inventory + lead_in;
            // A release is never negative: a level band wholly below zero
            // (the level rose: an unmetered transfer in) bounds it at zero.
            let (bound_low, bound_high) = ((centre - u).max(0.0), (centre + u).min(cap).max(0.0));
            let bound_high = bound_high.max(bound_low);
            let split = |x: f64| (x * liquid_share, x * (1.0 - liquid_share));
            let ((l_low, v_low), (l_best, v_best), (l_high, v_high)) =
                (split(low), split(best), split(high));
            let (l_low, l_high) = (
                l_low - self.bridge_uncertainty_kg,
                l_high + self.bridge_uncertainty_kg,
            );
            band.model_low_kg = l_low.max(0.0) + v_low;
            band.model_high_kg = l_high + v_high;
            let consistent = l_low <= bound_high && bound_low <= l_high;
            if !consistent {
                warnings.insert(Warning::LevelContradictsModel);
            }
            // A bridge the level cut (the flow slowed or stopped in a gap)
            // has refuted the model as surely as a level outside its band:
            // from then on the figures follow the level, at once, rather
            // than once the model has run on far enough past it.
            let refuted = !consistent || self.quality.bridge_cut_kg > 0.0;
            if refuted && !self.level_mode {
                self.level_mode = true;
                entered_level_mode = true;
            }
            let b_best =
                if consistent && (bound_low..=bound_high).contains(&l_best) && !self.level_mode {
                    l_best
                } else {
                    // The level says the model's flow at the chosen Cd is wrong
                    // (a hole plugged or slowed, a size or Cd that does not fit):
                    // from here on, in this revision, the figures follow the
                    // level.
                    if !self.level_mode {
                        self.level_mode = true;
                        entered_level_mode = true;
                    }
                    let (smoothed, inventory_rate) = self.level_line(inventory, u);
                    // Only a flow the level's slope can tell from zero.
                    rate = significant_rate(inventory_rate);
                    // The level's own figure: the last minute's line (less
                    // noisy than one reading), inside the level's band.
                    (smoothed + lead_in).clamp(bound_low, bound_high)
                };
            let (b_low, b_high) = if method == Method::FittedHole {
                // The fit's spread about its best figure, and never less
                // than what the level allows.
                (
                    (b_best - (l_best - l_low)).min(bound_low),
                    (b_best + (l_high - l_best)).max(bound_high),
                )
            } else {
                (bound_low, bound_high)
            };
            if !consistent || b_best != l_best {
                reason = match method {
                    Method::OrificeGivenHole => Reason::LevelBoundsGivenHole,
                    _ => Reason::LevelBoundsFittedHole,
                };
            }
            low = b_low.min(b_best) + v_low;
            best = b_best + v_best;
            high = b_high.min(cap.max(b_best)).max(b_best) + v_high;
        } else if model.is_none() {
            best = best.min(cap);
            high = high.min(cap).max(best);
            low = low.min(best);
            if no_loss {
                rate = significant_rate(rate);
            }
        }
        ((low, best, high), rate, reason, entered_level_mode)
    }

    /// The ratchet: a total shown once is never lower later in this
    /// revision, except by a recorded reconciliation: when a gap ends
    /// and the level on its far side shows less, or when the level first
    /// refutes the model's figure. Its high end likewise. Its low end is
    /// not ratcheted: the highest of many lower bounds is not a lower
    /// bound at the same confidence, and a low end held up by an
    /// earlier, refuted model would rule out the truth. While no loss is
    /// seen the figures move with the level: ratcheting its noise would
    /// build a release out of nothing. `reconciling`: this sample ends a
    /// gap, or is the first at which the level refutes the model.
    fn ratchet(&mut self, figures: Triple, u: f64, no_loss: bool, reconciling: bool) -> Triple {
        let shown = self.shown;
        let (low, best, high) = figures;
        if no_loss {
            self.shown = (low, best, high);
        } else if reconciling && best < shown.1 - 0.5 * u {
            self.quality.revisions_down += 1;
            self.quality.revised_down_kg += shown.1 - best;
            self.shown = (low, best, high);
        } else {
            self.shown = (low, shown.1.max(best), shown.2.max(high));
        }
        let (low, best, high) = self.shown;
        (low.min(best), best, high.max(best))
    }

    /// Notes the reportable quantities this sample's figures reach: the
    /// best figure's crossing and the high end's (from the gap's start,
    /// when reached across one).
    fn note_crossings(
        &mut self,
        at_ms: i64,
        best: f64,
        high: f64,
        no_loss: bool,
        gap_from: Option<i64>,
    ) {
        for c in &mut self.crossings {
            // The best figure's crossing once a loss is seen: before, it is
            // the level's noise, which may cross a small quantity and fall
            // back.
            if c.at_ms.is_none() && !no_loss && best >= c.quantity_kg {
                c.at_ms = Some(at_ms);
            }
            // Reached across a gap: it may have been reached anywhere in
            // the gap, so from its start.
            if c.high_at_ms.is_none() && high >= c.quantity_kg {
                c.high_at_ms = Some(gap_from.unwrap_or(at_ms));
            }
        }
    }

    /// The warnings that stand for the event as a whole (its data
    /// quality and assumptions) and for this reading's held values.
    fn standing_warnings(&self, r: &Reading, best: f64, warnings: &mut Warnings) {
        if self.quality.bridged_kg > BRIDGED_SHARE_WARNING * best && self.quality.bridged_kg > 0.0 {
            warnings.insert(Warning::BridgedGapsDominate);
        }
        if self.quality.bridge_cut_kg > 0.0 {
            warnings.insert(Warning::BridgeCutByLevel);
        }
        if self.quality.revisions_down > 0 {
            warnings.insert(Warning::TotalRevisedDown);
        }
        if r.held.pressure {
            warnings.insert(Warning::PressureHeld);
        }
        if r.held.transfer {
            warnings.insert(Warning::TransferHeld);
        }
        if r.held.temperature {
            warnings.insert(Warning::TemperatureHeld);
        }
        if self.params.hole_height_assumed {
            warnings.insert(Warning::HoleHeightAssumed);
        }
        if self.params.cd_assumed && self.params.hole_diameter_m.is_some() {
            warnings.insert(Warning::CdAssumed);
        }
        if self.default_accuracies {
            warnings.insert(Warning::DefaultAccuracies);
        }
        if self.start_bridged {
            warnings.insert(Warning::StartBridged);
        }
    }

    /// Picks the state the forecast is made from, by sample time: every
    /// `FORECAST_EVERY_MS`, at once while no hole is known, and when the
    /// level first refutes the model.
    #[allow(clippy::too_many_arguments)]
    fn schedule_forecast(
        &mut self,
        r: &Reading,
        unit: &Outflow,
        entered_level_mode: bool,
        rate_best: f64,
        best: f64,
        cap: f64,
        u: f64,
    ) {
        let due = entered_level_mode
            || self
                .forecast_input
                .is_none_or(|i| i.hole_cd.is_none() || r.at_ms - i.at_ms >= FORECAST_EVERY_MS);
        if due {
            let hole_cd = self.forecast_hole(unit.rate.si(), rate_best);
            self.forecast_input = Some(ForecastInput {
                at_ms: r.at_ms,
                state: r.state,
                hole_cd,
                vapour: matches!(unit.phase, Phase::Vapour(_)),
                released: best,
                cap,
                uncertainty: u,
            });
        }
    }

    /// The level's line over the last minute (from five points on): its
    /// value at this sample, held inside the level's band (`inventory` ±
    /// `u`), and the inventory balance's rate from its slope. Made only
    /// where a figure uses it: two divisions and a square root a sample.
    fn level_line(&self, inventory: f64, u: f64) -> (f64, (f64, f64, f64)) {
        let line = self.recent_inventory.line().filter(|l| l.points >= 5);
        let smoothed = line
            .map_or(inventory, |l| l.value)
            .clamp(inventory - u, inventory + u);
        (smoothed, Self::inventory_rate(line))
    }

    /// The inventory balance's own rate: the least-squares slope of the
    /// inventory over the last minute, with a two-sigma band (low clamped at
    /// zero). Noisy, but a leak in progress never shows as zero flow just
    /// because no hole size is known yet.
    pub(super) fn inventory_rate(line: Option<fit::WindowLine>) -> (f64, f64, f64) {
        match line {
            Some(l) => (
                (l.slope - COVERAGE_FACTOR * l.slope_se).max(0.0),
                l.slope.max(0.0),
                (l.slope + COVERAGE_FACTOR * l.slope_se).max(0.0),
            ),
            None => (0.0, 0.0, 0.0),
        }
    }

    /// The fitted Cd·A and its standard error, once the fit may be shown.
    pub(super) fn fit_ready(&self) -> Option<(f64, f64)> {
        let needed = FIT_NOISE_MULTIPLE * self.level_noise();
        if self.fit.n < FIT_MIN_SAMPLES || self.level_drop() < needed {
            return None;
        }
        self.fit.slope().filter(|(k, _)| *k > 0.0)
    }

    pub(super) fn level_drop(&self) -> f64 {
        match (self.start, self.last) {
            (Some(start), Some(last)) => start.level - last.state.level.si(),
            _ => 0.0,
        }
    }

    /// The hole the orifice model uses: the operator's, else the fitted one.
    pub(super) fn hole_and_cd(&self) -> Option<(Hole, DischargeCoefficient)> {
        let height = Length::metres(self.params.hole_height_m);
        let hole = match self.params.hole_diameter_m {
            Some(d) => Hole::new(Length::metres(d), height).ok()?,
            None => {
                let (k, _) = self.fit_ready()?;
                Hole::with_area(Area::square_metres(k / self.cd.get()), height).ok()?
            }
        };
        Some((hole, self.cd))
    }
}

/// The latest sample's estimate as `compute` leaves it: its figures and
/// what the whole estimate needs beyond them, in a third of an
/// `Estimate`'s size (this is written every sample). The rest (the band's
/// causes one by one, the fit, the forecast, the crossings) is made when
/// the whole estimate is asked for.
#[derive(Debug, Clone, Copy)]
pub(super) struct Latest {
    figures: Figures,
    /// The band's per-sample parts; its causes one by one are `squares`'.
    band: BandCauses,
    squares: band::InventorySquares,
    state: TankState,
    density: f64,
    temperature: Option<f64>,
    choked: Option<bool>,
    quality: DataQuality,
}

impl Latest {
    /// The estimate of this sample, with the band's causes written out and
    /// the parts made on asking (fit, forecast, crossings) left empty.
    pub(super) fn estimate(&self) -> Estimate {
        let f = &self.figures;
        let mut band = self.band;
        self.squares.write_causes(&mut band);
        Estimate {
            at_ms: f.at_ms,
            released_best_kg: f.released_best_kg,
            released_low_kg: f.released_low_kg,
            released_high_kg: f.released_high_kg,
            rate_best_kg_s: f.rate_best_kg_s,
            rate_low_kg_s: f.rate_low_kg_s,
            rate_high_kg_s: f.rate_high_kg_s,
            method: f.method,
            reason: f.reason,
            inventory_kg: f.inventory_kg,
            model_kg: f.model_kg,
            fit: Fit::default(),
            fitted_diameter_m: None,
            implied_cd: None,
            level_m: self.state.level.si(),
            headspace_pa: self.state.headspace.si(),
            density_kg_m3: self.density,
            temperature_k: self.temperature,
            phase: f.phase,
            choked: self.choked,
            remaining_above_hole_kg: 0.0,
            forecast: None,
            crossings: Vec::new(),
            quality: self.quality,
            after_gap: f.after_gap,
            band,
            warnings: f.warnings,
        }
    }
}

/// What the fit's band and the implied Cd rest on, at the latest sample.
#[derive(Debug, Clone, Copy, Default)]
pub(super) struct FitInputs {
    pub(super) fit: Option<(f64, f64)>,
    pub(super) inventory: f64,
    pub(super) u: f64,
    pub(super) area_given: Option<f64>,
    pub(super) loss_seen: bool,
}

impl Estimator {
    /// The fit as an effective area with its band (or how far it has to go),
    /// the Cd the level implies at a given hole, and the fitted hole's
    /// diameter at the chosen Cd, into `e`.
    pub(super) fn fit_details(&self, e: &mut Estimate) {
        let FitInputs {
            fit,
            inventory,
            u,
            area_given,
            loss_seen,
        } = self.fit_inputs;
        e.fit = match fit {
            Some((k, se)) => {
                let relative = quad(
                    COVERAGE_FACTOR * se / k,
                    if inventory > 0.0 { u / inventory } else { 1.0 },
                );
                Fit::Ready {
                    area_m2: k,
                    area_low_m2: (k * (1.0 - relative)).max(0.0),
                    area_high_m2: k * (1.0 + relative),
                }
            }
            None => Fit::NotYet {
                level_drop_m: self.level_drop(),
                needed_m: FIT_NOISE_MULTIPLE * self.level_noise(),
            },
        };
        let (cd_low, cd_high) = self.cd_band;
        e.implied_cd = match (area_given, e.fit.area()) {
            (Some(area), Some((k_low, k, k_high))) if loss_seen => Some(ImpliedCd {
                best: k / area,
                low: k_low / area,
                high: k_high / area,
                in_range: c_overlaps(k_low / area, k_high / area, cd_low, cd_high),
            }),
            _ => None,
        };
        e.fitted_diameter_m =
            fit.map(|(k, _)| (4.0 * k / (std::f64::consts::PI * self.cd.get())).sqrt());
    }
}
