//! Least-squares lines for the estimator: one over the whole event (the
//! fitted hole), one over a sliding window (the inventory's smoothed value
//! and its own rate).
//!
//! Both are running sums, so a sample costs a few multiplications however
//! long the event. Left out: anything that knows what x and y mean.

use std::collections::VecDeque;

/// Running least squares of y on x with an intercept (Welford's updates,
/// stable over long runs).
#[derive(Debug, Clone, Default)]
pub struct LineFit {
    pub n: u64,
    mean_x: f64,
    mean_y: f64,
    sxx: f64,
    syy: f64,
    sxy: f64,
}

impl LineFit {
    pub fn push(&mut self, x: f64, y: f64) {
        self.n += 1;
        let inv_n = 1.0 / self.n as f64;
        let dx = x - self.mean_x;
        let dy = y - self.mean_y;
        self.mean_x += dx * inv_n;
        self.mean_y += dy * inv_n;
        self.sxx += dx * (x - self.mean_x);
        self.syy += dy * (y - self.mean_y);
        self.sxy += dx * (y - self.mean_y);
    }

    /// Slope and its standard error, from three points on.
    pub fn slope(&self) -> Option<(f64, f64)> {
        if self.n < 3 || self.sxx <= 0.0 {
            return None;
        }
        // One division for 1/sxx (this runs every sample).
        let inv_sxx = 1.0 / self.sxx;
        let slope = self.sxy * inv_sxx;
        let residual = (self.syy - slope * self.sxy).max(0.0);
        let se = (residual * inv_sxx / (self.n as f64 - 2.0)).sqrt();
        Some((slope, se))
    }
}

/// A least-squares line over the points of the last `span_ms`: its value
/// and slope at the newest point. Sums are kept relative to an origin that
/// moves with the window, and rebuilt from the points now and then, so
/// round-off cannot pile up over a long event.
#[derive(Debug, Clone)]
pub struct Window {
    span_ms: i64,
    /// (time, x, y): x is kept with its point, so the point's leaving
    /// takes back exactly what its coming added, without a division.
    points: VecDeque<(i64, f64, f64)>,
    origin_ms: i64,
    sums: Sums,
    since_rebuild: usize,
}

#[derive(Debug, Clone, Copy, Default)]
struct Sums {
    n: f64,
    x: f64,
    y: f64,
    xx: f64,
    xy: f64,
    yy: f64,
}

impl Sums {
    fn add(&mut self, x: f64, y: f64, sign: f64) {
        self.n += sign;
        self.x += sign * x;
        self.y += sign * y;
        self.xx += sign * x * x;
        self.xy += sign * x * y;
        self.yy += sign * y * y;
    }
}

/// What the window's line says at its newest point.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct WindowLine {
    pub points: usize,
    /// The line's value at the newest point.
    pub value: f64,
    /// Its slope (y per second) and the slope's standard error.
    pub slope: f64,
    pub slope_se: f64,
    /// The variance of the points about the line (its square root, the
    /// scatter, is `scatter()`: a square root a sample costs, and only
    /// tests want it).
    pub variance: f64,
}

impl WindowLine {
    /// The standard deviation of the points about the line.
    pub fn scatter(&self) -> f64 {
        self.variance.sqrt()
    }
}

impl Window {
    pub fn new(span_ms: i64) -> Self {
        Self {
            span_ms,
            points: VecDeque::new(),
            origin_ms: 0,
            sums: Sums::default(),
            since_rebuild: 0,
        }
    }

    fn x(&self, at_ms: i64) -> f64 {
        (at_ms - self.origin_ms) as f64 * 0.001
    }

    pub fn push(&mut self, at_ms: i64, y: f64) {
        if self.points.is_empty() {
            self.origin_ms = at_ms;
            self.sums = Sums::default();
        }
        let x = self.x(at_ms);
        self.points.push_back((at_ms, x, y));
        self.sums.add(x, y, 1.0);
        while let Some(&(t, old_x, old)) = self.points.front() {
            if at_ms - t <= self.span_ms {
                break;
            }
            self.points.pop_front();
            self.sums.add(old_x, old, -1.0);
        }
        self.since_rebuild += 1;
        if self.since_rebuild >= 1024 {
            self.rebuild();
        }
    }

    /// Forgets every point: the next line starts afresh (after a gap, the
    /// points either side belong to different regimes).
    pub fn clear(&mut self) {
        self.points.clear();
        self.sums = Sums::default();
        self.since_rebuild = 0;
    }

    fn rebuild(&mut self) {
        self.since_rebuild = 0;
        self.origin_ms = self.points.front().map_or(0, |p| p.0);
        let origin_ms = self.origin_ms;
        let mut sums = Sums::default();
        for (t, x, y) in &mut self.points {
            *x = (*t - origin_ms) as f64 * 0.001;
            sums.add(*x, *y, 1.0);
        }
        self.sums = sums;
    }

    /// The line through the window, from three points on.
    pub fn line(&self) -> Option<WindowLine> {
        let &(_, newest_x, _) = self.points.back()?;
        let s = self.sums;
        if s.n < 3.0 {
            return None;
        }
        // One division each for 1/n and 1/sxx (this runs every sample).
        let inv_n = 1.0 / s.n;
        let (mean_x, mean_y) = (s.x * inv_n, s.y * inv_n);
        let sxx = s.xx - s.x * mean_x;
        let sxy = s.xy - s.x * mean_y;
        let syy = (s.yy - s.y * mean_y).max(0.0);
        if sxx <= 0.0 {
            return None;
        }
        let inv_sxx = 1.0 / sxx;
        let slope = sxy * inv_sxx;
        let residual = (syy - slope * sxy).max(0.0);
        let variance = residual / (s.n - 2.0);
        Some(WindowLine {
            points: self.points.len(),
            value: mean_y + slope * (newest_x - mean_x),
            slope,
            slope_se: (variance * inv_sxx).sqrt(),
            variance,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_window_line_matches_a_direct_fit_and_forgets_old_points() {
        let mut w = Window::new(10_000);
        // y = 3 + 2 t over 20 s, plus a bump 15 s back that must have left.
        for i in 0..=20 {
            let t = i * 1000;
            let y = 3.0 + 2.0 * (t as f64 / 1000.0) + if i == 5 { 50.0 } else { 0.0 };
            w.push(1_700_000_000_000 + t, y);
        }
        let line = w.line().unwrap();
        assert_eq!(line.points, 11);
        assert!((line.slope - 2.0).abs() < 1e-9, "{line:?}");
        assert!((line.value - 43.0).abs() < 1e-9, "{line:?}");
        assert!(line.scatter() < 1e-6);
    }

    #[test]
    fn a_long_run_keeps_its_precision() {
        let mut w = Window::new(60_000);
        let mut direct = LineFit::default();
        for i in 0..200_000i64 {
            let y = 0.5 * i as f64 + (i % 7) as f64;
            w.push(i * 1000, y);
            if i >= 200_000 - 61 {
                direct.push(i as f64, y);
            }
        }
        let (slope, _) = direct.slope().unwrap();
        assert!((w.line().unwrap().slope - slope).abs() < 1e-9);
    }
}
