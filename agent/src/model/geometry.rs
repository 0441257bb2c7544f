//! Tank geometry: how much liquid a tank holds at a given level, the level
//! that holds a given volume, and the free-surface area at a level.
//!
//! Levels are measured up from the tank's lowest inside point (the datum), so
//! a horizontal cylinder's level runs from 0 to its diameter. The surface area
//! is the derivative of volume with respect to level; the draining forecast
//! needs it to turn an outflow into a falling level.
//!
//! Shapes: vertical cylinder (flat bottom), horizontal cylinder with flat or
//! ellipsoidal heads (a hemispherical head is the ellipsoid whose depth equals
//! the radius), sphere, and a calibration (strapping) table of level and
//! volume points with linear interpolation between them. Left out: conical
//! and torispherical heads, sloped bottoms and tilt corrections; a site with
//! such a tank gives its strapping table instead.

use super::error::{ModelError, ModelResult, finite, non_negative, positive};
use super::units::{Area, Length, Volume};
use std::f64::consts::PI;

/// The end closures of a horizontal cylinder.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Heads {
    /// Flat plates at both ends.
    Flat,
    /// Two ellipsoidal heads, each reaching `depth` beyond the straight shell.
    /// A 2:1 head has a depth of a quarter of the diameter; a hemispherical
    /// head has a depth of half the diameter.
    Ellipsoidal { depth: Length },
}

/// A validated tank shape. Build it with one of the constructors, which
/// reject dimensions that make no sense.
#[derive(Debug, Clone, PartialEq)]
pub struct Geometry {
    shape: Shape,
}

#[derive(Debug, Clone, PartialEq)]
enum Shape {
    VerticalCylinder {
        radius: f64,
        height: f64,
    },
    HorizontalCylinder {
        radius: f64,
        length: f64,
        head_depth: f64,
    },
    Sphere {
        radius: f64,
    },
    Table(CalibrationTable),
}

/// A strapping table: strictly rising levels with strictly rising volumes.
#[derive(Debug, Clone, PartialEq)]
struct CalibrationTable {
    levels: Vec<f64>,
    volumes: Vec<f64>,
}

/// How close to the top a level or volume may come from above before it is
/// called out of range: enough for round-off in unit conversions, far too
/// small to hide a scaling mistake.
const ROUND_OFF: f64 = 1e-9;

impl Geometry {
    /// An upright cylinder with a flat bottom.
    pub fn vertical_cylinder(diameter: Length, height: Length) -> ModelResult<Self> {
        let d = positive("tank diameter", diameter.si(), "m")?;
        let height = positive("tank height", height.si(), "m")?;
        Ok(Self {
            shape: Shape::VerticalCylinder {
                radius: d / 2.0,
                height,
            },
        })
    }

    /// A cylinder lying on its side; `length` is the straight shell from one
    /// head seam to the other, and the heads add to it.
    pub fn horizontal_cylinder(
        diameter: Length,
        length: Length,
        heads: Heads,
    ) -> ModelResult<Self> {
        let d = positive("tank diameter", diameter.si(), "m")?;
        let length = positive("tank length", length.si(), "m")?;
        let head_depth = match heads {
            Heads::Flat => 0.0,
            Heads::Ellipsoidal { depth } => {
                let a = positive("head depth", depth.si(), "m")?;
                if a > d / 2.0 * (1.0 + ROUND_OFF) {
                    return Err(ModelError::OutOfRange {
                        what: "head depth",
                        value: a,
                        min: 0.0,
                        max: d / 2.0,
                        unit: "m",
                    });
                }
                a
            }
        };
        Ok(Self {
            shape: Shape::HorizontalCylinder {
                radius: d / 2.0,
                length,
                head_depth,
            },
        })
    }

    /// A spherical tank.
    pub fn sphere(diameter: Length) -> ModelResult<Self> {
        let d = positive("tank diameter", diameter.si(), "m")?;
        Ok(Self {
            shape: Shape::Sphere { radius: d / 2.0 },
        })
    }

    /// A calibration table of (level, volume) points, the first at level 0.
    /// Between points the volume is interpolated linearly, as strapping
    /// tables are read by hand.
    pub fn calibration_table(points: &[(Length, Volume)]) -> ModelResult<Self> {
        if points.len() < 2 {
            return Err(ModelError::TableTooShort(points.len()));
        }
        let mut levels = Vec::with_capacity(points.len());
        let mut volumes = Vec::with_capacity(points.len());
        for (index, &(level, volume)) in points.iter().enumerate() {
            let h = finite("calibration table level", level.si())?;
            let v = non_negative("calibration table volume", volume.si(), "m³")?;
            if index == 0 && h != 0.0 {
                return Err(ModelError::TableStart(h));
            }
            if let (Some(&h0), Some(&v0)) = (levels.last(), volumes.last()) {
                if h <= h0 {
                    return Err(ModelError::TableNotIncreasing {
                        index,
                        what: "level (m)",
                        previous: h0,
                        next: h,
                    });
                }
                if v <= v0 {
                    return Err(ModelError::TableNotIncreasing {
                        index,
                        what: "volume (m³)",
                        previous: v0,
                        next: v,
                    });
                }
            }
            levels.push(h);
            volumes.push(v);
        }
        Ok(Self {
            shape: Shape::Table(CalibrationTable { levels, volumes }),
        })
    }

    /// The highest level the tank can hold.
    pub fn height(&self) -> Length {
        Length::metres(self.height_si())
    }

    /// The volume at the highest level.
    pub fn capacity(&self) -> Volume {
        Volume::cubic_metres(self.volume_si(self.height_si()))
    }

    /// The liquid volume at a level.
    pub fn volume(&self, level: Length) -> ModelResult<Volume> {
        let h = self.check_level(level)?;
        Ok(Volume::cubic_metres(self.volume_si(h)))
    }

    /// The level at which the tank holds a volume.
    pub fn level(&self, volume: Volume) -> ModelResult<Length> {
        let v = non_negative("liquid volume", volume.si(), "m³")?;
        let capacity = self.capacity().si();
        if v > capacity * (1.0 + ROUND_OFF) {
            return Err(ModelError::VolumeAboveCapacity {
                volume_m3: v,
                capacity_m3: capacity,
            });
        }
        let floor = self.volume_si(0.0);
        if v < floor * (1.0 - ROUND_OFF) {
            return Err(ModelError::OutOfRange {
                what: "liquid volume",
                value: v,
                min: floor,
                max: capacity,
                unit: "m³",
            });
        }
        Ok(Length::metres(self.level_si(v)))
    }

    /// The area of the free liquid surface at a level.
    pub fn surface_area(&self, level: Length) -> ModelResult<Area> {
        let h = self.check_level(level)?;
        Ok(Area::square_metres(self.area_si(h)))
    }

    /// Validates a level against this tank: a finite number from 0 to the top.
    pub fn check_level(&self, level: Length) -> ModelResult<f64> {
        let h = non_negative("liquid level", level.si(), "m")?;
        let top = self.height_si();
        if h > top * (1.0 + ROUND_OFF) {
            return Err(ModelError::LevelAboveTank {
                level_m: h,
                top_m: top,
            });
        }
        Ok(h.min(top))
    }

    /// Levels at which the surface area jumps (the points of a calibration
    /// table); numerical integration over level splits there.
    pub(crate) fn breakpoints(&self) -> &[f64] {
        match &self.shape {
            Shape::Table(t) => &t.levels,
            _ => &[],
        }
    }

    pub(crate) fn height_si(&self) -> f64 {
        match &self.shape {
            Shape::VerticalCylinder { height, .. } => *height,
            Shape::HorizontalCylinder { radius, .. } | Shape::Sphere { radius } => 2.0 * radius,
            Shape::Table(t) => *t.levels.last().unwrap_or(&0.0),
        }
    }

    /// Volume at level `h` in SI, for a level already known to be in range
    /// (it is clamped to the tank, never extrapolated).
    pub(crate) fn volume_si(&self, h: f64) -> f64 {
        let h = h.clamp(0.0, self.height_si());
        match &self.shape {
            Shape::VerticalCylinder { radius, .. } => PI * radius * radius * h,
            Shape::HorizontalCylinder {
                radius,
                length,
                head_depth,
            } => {
                length * circular_segment_area(*radius, h)
                    + ellipsoid_volume_to_level(*radius, *head_depth, h)
            }
            Shape::Sphere { radius } => PI * h * h * (3.0 * radius - h) / 3.0,
            Shape::Table(t) => t.volume(h),
        }
    }

    /// Free-surface area at level `h` in SI, for a level already in range.
    pub(crate) fn area_si(&self, h: f64) -> f64 {
        let h = h.clamp(0.0, self.height_si());
        match &self.shape {
            Shape::VerticalCylinder { radius, .. } => PI * radius * radius,
            Shape::HorizontalCylinder {
                radius,
                length,
                head_depth,
            } => {
                let chord = 2.0 * (h * (2.0 * radius - h)).max(0.0).sqrt();
                // d/dh of the ellipsoid volume below: pi a h (2r - h) / r.
                length * chord + PI * head_depth * h * (2.0 * radius - h) / radius
            }
            Shape::Sphere { radius } => PI * h * (2.0 * radius - h),
            Shape::Table(t) => t.slope(h),
        }
    }

    /// Level holding volume `v` in SI, for a volume already in range.
    pub(crate) fn level_si(&self, v: f64) -> f64 {
        match &self.shape {
            Shape::VerticalCylinder { radius, height } => {
                (v / (PI * radius * radius)).clamp(0.0, *height)
            }
            Shape::Table(t) => t.level(v),
            Shape::HorizontalCylinder { .. } | Shape::Sphere { .. } => self.invert_volume(v),
        }
    }

    /// Solves volume(h) = v by Newton's method kept inside a shrinking
    /// bracket. Plain Newton fails near the bottom and top of a horizontal
    /// cylinder or sphere, where the surface area (the derivative) goes to
    /// zero; the bracket turns such steps into bisection.
    fn invert_volume(&self, v: f64) -> f64 {
        let (mut lo, mut hi) = (0.0, self.height_si());
        let target = v.clamp(self.volume_si(lo), self.volume_si(hi));
        let mut h = self.height_si() * (target / self.volume_si(hi)).clamp(0.0, 1.0);
        for _ in 0..200 {
            let f = self.volume_si(h) - target;
            if f == 0.0 {
                return h;
            }
            if f > 0.0 {
                hi = h;
            } else {
                lo = h;
            }
            let slope = self.area_si(h);
            let newton = h - f / slope;
            let next = if slope > 0.0 && newton > lo && newton < hi {
                newton
            } else {
                0.5 * (lo + hi)
            };
            if (next - h).abs() <= 4.0 * f64::EPSILON * self.height_si() {
                return next;
            }
            h = next;
        }
        h
    }
}

impl CalibrationTable {
    /// Index of the segment `[levels[i], levels[i + 1])` holding `h`; the top
    /// point belongs to the last segment.
    fn segment_by_level(&self, h: f64) -> usize {
        let upper = self.levels.partition_point(|&x| x <= h);
        upper.clamp(1, self.levels.len() - 1) - 1
    }

    fn volume(&self, h: f64) -> f64 {
        let i = self.segment_by_level(h);
        let (h0, h1) = (self.levels[i], self.levels[i + 1]);
        let (v0, v1) = (self.volumes[i], self.volumes[i + 1]);
        v0 + (v1 - v0) * (h - h0) / (h1 - h0)
    }

    fn slope(&self, h: f64) -> f64 {
        let i = self.segment_by_level(h);
        (self.volumes[i + 1] - self.volumes[i]) / (self.levels[i + 1] - self.levels[i])
    }

    fn level(&self, v: f64) -> f64 {
        let upper = self.volumes.partition_point(|&x| x <= v);
        let i = upper.clamp(1, self.volumes.len() - 1) - 1;
        let (h0, h1) = (self.levels[i], self.levels[i + 1]);
        let (v0, v1) = (self.volumes[i], self.volumes[i + 1]);
        (h0 + (h1 - h0) * (v - v0) / (v1 - v0)).clamp(h0, h1)
    }
}

/// Area of the circular segment of a circle of radius `r` below a chord at
/// height `h` above the circle's lowest point.
///
/// Written with the central angle theta = 4 asin(sqrt(h / 2r)) as
/// r² (theta - sin theta) / 2 rather than the textbook
/// r² acos((r - h)/r) - (r - h) sqrt(2rh - h²): both subtract nearly equal
/// numbers near the bottom, but here the small-angle series removes the
/// cancellation.
pub(crate) fn circular_segment_area(r: f64, h: f64) -> f64 {
    let h = h.clamp(0.0, 2.0 * r);
    let theta = 4.0 * (h / (2.0 * r)).sqrt().min(1.0).asin();
    let theta_minus_sin = if theta < 1e-2 {
        let t3 = theta * theta * theta;
        t3 / 6.0 - t3 * theta * theta / 120.0 + t3 * theta.powi(4) / 5040.0
    } else {
        theta - theta.sin()
    };
    0.5 * r * r * theta_minus_sin
}

/// Liquid volume in the two ellipsoidal heads of a horizontal cylinder of
/// radius `r`, each head of depth `a`, filled to height `h`.
///
/// The two heads together make one ellipsoid with semi-axes (a, r, r); it is
/// a sphere of radius r stretched by a/r along the tank's axis, so its fill
/// volume is the spherical cap's, pi h² (3r - h) / 3, times a/r.
fn ellipsoid_volume_to_level(r: f64, a: f64, h: f64) -> f64 {
    PI * a * h * h * (3.0 * r - h) / (3.0 * r)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn m(x: f64) -> Length {
        Length::metres(x)
    }

    /// Checks each (geometry, level, expected volume) row, in the table style
    /// rust-analyzer uses for data-driven tests.
    fn check_volumes(cases: &[(&Geometry, f64, f64)], rel_tol: f64) {
        for (i, &(g, level, expected)) in cases.iter().enumerate() {
            let got = g.volume(m(level)).unwrap().si();
            let err = ((got - expected) / expected.max(1e-300)).abs();
            assert!(
                err <= rel_tol || (got - expected).abs() < 1e-15,
                "case {i}: volume at {level} m = {got}, expected {expected} (rel err {err:e})"
            );
        }
    }

    #[test]
    fn closed_form_volumes() {
        let vertical = Geometry::vertical_cylinder(m(2.0), m(4.0)).unwrap();
        let horizontal = Geometry::horizontal_cylinder(m(2.0), m(10.0), Heads::Flat).unwrap();
        let sphere = Geometry::sphere(m(2.0)).unwrap();
        let hemi =
            Geometry::horizontal_cylinder(m(2.0), m(3.0), Heads::Ellipsoidal { depth: m(1.0) })
                .unwrap();
        check_volumes(
            &[
                // Cylinder: pi r² h.
                (&vertical, 1.0, PI),
                (&vertical, 4.0, 4.0 * PI),
                // Half-full horizontal cylinder: half the circle times length.
                (&horizontal, 1.0, 5.0 * PI),
                (&horizontal, 2.0, 10.0 * PI),
                // A chord at h = r/2 subtends a central angle of 2pi/3, so the
                // segment is r²/2 (2pi/3 - sin(2pi/3)) (analytic).
                (
                    &horizontal,
                    0.5,
                    10.0 * 0.5 * (2.0 * PI / 3.0 - (3f64).sqrt() / 2.0),
                ),
                // Sphere: half of 4/3 pi r³ at the equator, all of it at the top.
                (&sphere, 1.0, 2.0 * PI / 3.0),
                (&sphere, 2.0, 4.0 * PI / 3.0),
                // Hemispherical heads make a full sphere plus the shell.
                (&hemi, 2.0, 4.0 * PI / 3.0 + 3.0 * PI),
            ],
            1e-14,
        );
    }

    #[test]
    fn segment_area_is_continuous_where_the_small_angle_series_takes_over() {
        // Just above the switch the closed form theta - sin(theta) still has
        // about eleven good digits; the series just below must meet it.
        let r = 1.0;
        let theta_at = |h: f64| 4.0 * (h / (2.0 * r)).sqrt().asin();
        let mut h_switch = 1.25e-5;
        while theta_at(h_switch) >= 1e-2 {
            h_switch *= 0.999_999;
        }
        let below = circular_segment_area(r, h_switch);
        let theta = theta_at(h_switch * (1.0 + 1e-12));
        let closed = 0.5 * r * r * (theta - theta.sin());
        assert!(
            ((below - closed) / closed).abs() < 1e-9,
            "{below} vs {closed}"
        );
    }

    #[test]
    fn segment_area_near_the_bottom_matches_its_leading_term() {
        // Analytic: for h << r the segment is (4/3) sqrt(2r) h^(3/2) to
        // leading order, with relative correction -3h/(20r).
        let r: f64 = 1.25;
        for h in [1e-9_f64, 1e-7, 1e-5] {
            let leading =
                4.0 / 3.0 * (2.0 * r).sqrt() * h * f64::sqrt(h) * (1.0 - 3.0 * h / (20.0 * r));
            let got = circular_segment_area(r, h);
            assert!(
                ((got - leading) / leading).abs() < 1e-9,
                "h {h}: {got} vs {leading}"
            );
        }
    }

    #[test]
    fn surface_area_is_the_derivative_of_volume() {
        let shapes = [
            Geometry::vertical_cylinder(m(3.0), m(5.0)).unwrap(),
            Geometry::horizontal_cylinder(m(2.5), m(8.0), Heads::Flat).unwrap(),
            Geometry::horizontal_cylinder(m(2.0), m(6.0), Heads::Ellipsoidal { depth: m(0.5) })
                .unwrap(),
            Geometry::sphere(m(10.0)).unwrap(),
        ];
        for g in &shapes {
            let top = g.height_si();
            for k in 1..20 {
                let h = top * k as f64 / 20.0;
                let dh = 1e-6 * top;
                let numeric = (g.volume_si(h + dh) - g.volume_si(h - dh)) / (2.0 * dh);
                let analytic = g.area_si(h);
                assert!(
                    ((numeric - analytic) / analytic).abs() < 1e-6,
                    "{g:?} at {h}: {numeric} vs {analytic}"
                );
            }
        }
    }

    #[test]
    fn table_interpolates_and_inverts() {
        let t = Geometry::calibration_table(&[
            (m(0.0), Volume::cubic_metres(0.5)),
            (m(1.0), Volume::cubic_metres(10.5)),
            (m(2.0), Volume::cubic_metres(30.5)),
        ])
        .unwrap();
        assert_eq!(t.volume(m(0.5)).unwrap().si(), 5.5);
        assert_eq!(t.volume(m(1.5)).unwrap().si(), 20.5);
        assert_eq!(t.surface_area(m(1.5)).unwrap().si(), 20.0);
        assert_eq!(t.level(Volume::cubic_metres(20.5)).unwrap().si(), 1.5);
        assert_eq!(t.level(Volume::cubic_metres(30.5)).unwrap().si(), 2.0);
        assert_eq!(t.breakpoints(), &[0.0, 1.0, 2.0]);
    }

    #[test]
    fn bad_dimensions_are_refused_with_the_culprit_named() {
        let cases: Vec<(ModelResult<Geometry>, &str)> = vec![
            (Geometry::vertical_cylinder(m(0.0), m(4.0)), "tank diameter"),
            (Geometry::vertical_cylinder(m(2.0), m(-1.0)), "tank height"),
            (Geometry::sphere(m(f64::NAN)), "not a number"),
            (
                Geometry::horizontal_cylinder(m(2.0), m(5.0), Heads::Ellipsoidal { depth: m(1.5) }),
                "head depth",
            ),
            (
                Geometry::calibration_table(&[(m(0.0), Volume::ZERO)]),
                "at least two points",
            ),
            (
                Geometry::calibration_table(&[
                    (m(0.1), Volume::ZERO),
                    (m(1.0), Volume::litres(5.0)),
                ]),
                "start at level 0",
            ),
            (
                Geometry::calibration_table(&[
                    (m(0.0), Volume::ZERO),
                    (m(1.0), Volume::cubic_metres(2.0)),
                    (m(2.0), Volume::cubic_metres(1.5)),
                ]),
                "not increasing at point 2: volume",
            ),
            (
                Geometry::calibration_table(&[
                    (m(0.0), Volume::ZERO),
                    (m(1.0), Volume::cubic_metres(2.0)),
                    (m(1.0), Volume::cubic_metres(3.0)),
                ]),
                "not increasing at point 2: level",
            ),
        ];
        for (result, expected) in cases {
            let message = result.expect_err(expected).to_string();
            assert!(message.contains(expected), "{message:?} lacks {expected:?}");
        }
    }

    #[test]
    fn levels_outside_the_tank_are_refused() {
        let g = Geometry::vertical_cylinder(m(2.0), m(4.0)).unwrap();
        assert!(matches!(
            g.volume(m(4.5)),
            Err(ModelError::LevelAboveTank { .. })
        ));
        assert!(matches!(
            g.volume(m(-0.1)),
            Err(ModelError::Negative { .. })
        ));
        assert!(matches!(
            g.volume(m(f64::NAN)),
            Err(ModelError::NotFinite { .. })
        ));
        assert!(matches!(
            g.level(Volume::cubic_metres(100.0)),
            Err(ModelError::VolumeAboveCapacity { .. })
        ));
    }
}
