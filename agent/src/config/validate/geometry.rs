//! Checking a tank's shape: which keys each shape takes, dimensions within
//! what a tank can be, a horizontal cylinder's heads, and a strapping
//! table's points; the model then checks what only it can (a head no deeper
//! than half the diameter, a table that increases).
//!
//! Left out: the vessel built from the shape and the substance (`tank`).

use super::{
    Checker, HEAD_DEPTH_M, HORIZONTAL_DIAMETER_M, HORIZONTAL_LENGTH_M, MAX_TABLE_POINTS,
    MAX_TABLE_VOLUME_M3, SPHERE_DIAMETER_M, TANK_HEIGHT_M, VERTICAL_DIAMETER_M, shown,
};
use crate::config::raw::{RawGeometry, RawHeads, RawShape};
use crate::model::{Geometry, Heads, Length, Volume};
use std::ops::Range;
use toml::Spanned;

impl Checker {
    pub(super) fn geometry(&mut self, g: &Spanned<RawGeometry>, ctx: &str) -> Option<Geometry> {
        let raw = g.get_ref();
        let gctx = format!("{ctx} geometry");
        let keys_ok = self.shape_keys(raw, &gctx);
        let m = Length::metres;
        // A dimension out of range ends the shape at its `?`, said already.
        let result = match *raw.shape.get_ref() {
            RawShape::VerticalCylinder => {
                let d = self.dimension(&raw.diameter_m, &gctx, "diameter_m", VERTICAL_DIAMETER_M);
                let h = self.dimension(&raw.height_m, &gctx, "height_m", TANK_HEIGHT_M);
                Geometry::vertical_cylinder(m(d?), m(h?))
            }
            RawShape::HorizontalCylinder => {
                let d = self.dimension(&raw.diameter_m, &gctx, "diameter_m", HORIZONTAL_DIAMETER_M);
                let l = self.dimension(&raw.length_m, &gctx, "length_m", HORIZONTAL_LENGTH_M);
                let depth = self.dimension(&raw.head_depth_m, &gctx, "head_depth_m", HEAD_DEPTH_M);
                let (d, l) = (d?, l?);
                let heads = self.heads(g, &gctx, d, depth)?;
                Geometry::horizontal_cylinder(m(d), m(l), heads)
            }
            RawShape::Sphere => {
                let d = self.dimension(&raw.diameter_m, &gctx, "diameter_m", SPHERE_DIAMETER_M);
                Geometry::sphere(m(d?))
            }
            RawShape::Table => {
                let points = self.table_points(raw.points.as_ref()?, &gctx)?;
                let located = raw.points.as_ref().map_or(g.span(), Spanned::span);
                return self.model(located, &gctx, Geometry::calibration_table(&points));
            }
        };
        if !keys_ok {
            return None;
        }
        self.model(g.span(), &gctx, result)
    }

    /// Whether the geometry has every key its shape needs and none that it
    /// does not take.
    fn shape_keys(&mut self, raw: &RawGeometry, gctx: &str) -> bool {
        let name = raw.shape.get_ref().name();
        let (required, optional) = raw.shape.get_ref().keys();
        let present: [(&str, Option<Range<usize>>); 6] = [
            ("diameter_m", raw.diameter_m.as_ref().map(Spanned::span)),
            ("height_m", raw.height_m.as_ref().map(Spanned::span)),
            ("length_m", raw.length_m.as_ref().map(Spanned::span)),
            ("heads", raw.heads.as_ref().map(Spanned::span)),
            ("head_depth_m", raw.head_depth_m.as_ref().map(Spanned::span)),
            ("points", raw.points.as_ref().map(Spanned::span)),
        ];
        let mut ok = true;
        for (key, span) in present {
            match span {
                Some(span) if !required.contains(&key) && !optional.contains(&key) => {
                    let takes: Vec<&str> = required.iter().chain(optional).copied().collect();
                    self.problem(
                        span,
                        format!(
                            "{gctx}: {key} does not apply to shape \"{name}\", which takes: {}; remove it",
                            takes.join(", ")
                        ),
                    );
                    ok = false;
                }
                None if required.contains(&key) => {
                    self.problem(
                        raw.shape.span(),
                        format!("{gctx}: shape \"{name}\" needs {key}; add it (config/reference.toml shows each shape)"),
                    );
                    ok = false;
                }
                _ => {}
            }
        }
        ok
    }

    /// A dimension in metres within its plausible `(lo, hi)`, if the key is
    /// there (a missing one is the shape's to say).
    fn dimension(
        &mut self,
        value: &Option<Spanned<f64>>,
        gctx: &str,
        what: &str,
        (lo, hi): (f64, f64),
    ) -> Option<f64> {
        let v = value.as_ref()?;
        let x = *v.get_ref();
        if x.is_finite() && (lo..=hi).contains(&x) {
            Some(x)
        } else {
            self.problem(
                v.span(),
                format!(
                    "{gctx}: {what} = {} m is outside the plausible {lo} to {hi} m; give it in metres (a {what} in mm would be 1000 times too large)",
                    shown(x)
                ),
            );
            None
        }
    }

    /// A horizontal cylinder's heads: flat unless said, hemispherical (half
    /// the diameter deep), or ellipsoidal with `head_depth_m`, which no
    /// other heads take. `depth` is `head_depth_m` if it is plausible.
    fn heads(
        &mut self,
        g: &Spanned<RawGeometry>,
        gctx: &str,
        diameter: f64,
        depth: Option<f64>,
    ) -> Option<Heads> {
        let raw = g.get_ref();
        let m = Length::metres;
        let heads = raw.heads.as_ref().map_or(RawHeads::Flat, |h| *h.get_ref());
        match (heads, depth, &raw.head_depth_m) {
            (_, None, Some(_)) => None, // said by dimension
            (RawHeads::Flat, None, None) => Some(Heads::Flat),
            (RawHeads::Hemispherical, None, None) => Some(Heads::Ellipsoidal {
                depth: m(diameter / 2.0),
            }),
            (RawHeads::Ellipsoidal, Some(depth), _) => Some(Heads::Ellipsoidal { depth: m(depth) }),
            (RawHeads::Ellipsoidal, None, None) => {
                self.problem(
                    raw.heads.as_ref().map_or(g.span(), Spanned::span),
                    format!("{gctx}: ellipsoidal heads need head_depth_m (a quarter of the diameter for 2:1 heads)"),
                );
                None
            }
            (_, Some(_), Some(span)) => {
                self.problem(
                    span.span(),
                    format!("{gctx}: head_depth_m applies only to heads = \"ellipsoidal\"; remove it or change the heads"),
                );
                None
            }
            (_, Some(_), None) => None, // cannot happen: a depth has its key
        }
    }

    /// A strapping table's points: each exactly [level_m, volume_m3], both
    /// within what a tank can be; the model checks the order.
    fn table_points(
        &mut self,
        points: &Spanned<Vec<Spanned<Vec<f64>>>>,
        gctx: &str,
    ) -> Option<Vec<(Length, Volume)>> {
        if points.get_ref().len() > MAX_TABLE_POINTS {
            self.problem(
                points.span(),
                format!(
                    "{gctx}: the table has {} points; at most {MAX_TABLE_POINTS} are read (thin it: the volume is interpolated linearly between points)",
                    points.get_ref().len()
                ),
            );
            return None;
        }
        let mut out = Vec::with_capacity(points.get_ref().len());
        let mut ok = true;
        for (i, point) in points.get_ref().iter().enumerate() {
            let n = i + 1;
            let &[h, v] = point.get_ref().as_slice() else {
                self.problem(
                    point.span(),
                    format!(
                        "{gctx}: point {n} has {} number(s); each point is two, [level_m, volume_m3]",
                        point.get_ref().len()
                    ),
                );
                ok = false;
                continue;
            };
            let (h_lo, h_hi) = (0.0, TANK_HEIGHT_M.1);
            if !(h.is_finite() && (h_lo..=h_hi).contains(&h)) {
                self.problem(
                    point.span(),
                    format!(
                        "{gctx}: point {n} has level {} m, outside the plausible {h_lo} to {h_hi} m; give levels in metres above the tank's lowest point",
                        shown(h)
                    ),
                );
                ok = false;
            }
            if !(v.is_finite() && (0.0..=MAX_TABLE_VOLUME_M3).contains(&v)) {
                self.problem(
                    point.span(),
                    format!(
                        "{gctx}: point {n} has volume {} m³, outside the plausible 0 to {} m³; give volumes in cubic metres (litres would be 1000 times too large)",
                        shown(v),
                        shown(MAX_TABLE_VOLUME_M3)
                    ),
                );
                ok = false;
            }
            out.push((Length::metres(h), Volume::cubic_metres(v)));
        }
        ok.then_some(out)
    }
}
