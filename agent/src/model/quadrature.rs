//! Adaptive Gauss–Kronrod quadrature (the 7-point Gauss rule embedded in the
//! 15-point Kronrod rule), the workhorse of QUADPACK.
//!
//! The forecast needs integrals of smooth functions to about twelve digits
//! and a record of where the work went, so that it can later find the point
//! at which a running integral reaches a given value. [`integrate`] therefore
//! returns the accepted panels in order, each with its own integral.

/// Kronrod nodes on [-1, 1] (the non-negative half, largest first) and their
/// weights; every second node is also a node of the 7-point Gauss rule.
/// Values as tabulated in QUADPACK's `qk15` (Piessens et al., 1983); the
/// unit tests below check them by integrating polynomials exactly. The
/// digits are kept as tabulated, beyond f64's, so they can be compared with
/// the table by eye.
#[allow(clippy::excessive_precision)]
const KRONROD_NODES: [f64; 8] = [
    0.991_455_371_120_812_639_206_854_697_526_329,
    0.949_107_912_342_758_524_526_189_684_047_851,
    0.864_864_423_359_769_072_789_712_788_640_926,
    0.741_531_185_599_394_439_863_864_773_280_788,
    0.586_087_235_467_691_130_294_144_845_693_013,
    0.405_845_151_377_397_166_906_606_412_076_961,
    0.207_784_955_007_898_467_600_689_403_773_245,
    0.0,
];
#[allow(clippy::excessive_precision)]
const KRONROD_WEIGHTS: [f64; 8] = [
    0.022_935_322_010_529_224_963_732_008_058_970,
    0.063_092_092_629_978_553_290_700_663_189_204,
    0.104_790_010_322_250_183_839_876_322_541_518,
    0.140_653_259_715_525_918_745_189_590_510_238,
    0.169_004_726_639_267_902_826_583_426_598_550,
    0.190_350_578_064_785_409_913_256_402_421_014,
    0.204_432_940_075_298_892_414_161_999_234_649,
    0.209_482_141_084_727_828_012_999_174_891_714,
];
/// Gauss weights for the Kronrod nodes 1, 3, 5 and 7 (the centre).
#[allow(clippy::excessive_precision)]
const GAUSS_WEIGHTS: [f64; 4] = [
    0.129_484_966_168_869_693_270_611_432_679_082,
    0.279_705_391_489_276_667_901_467_771_423_780,
    0.381_830_050_505_118_944_950_369_775_488_975,
    0.417_959_183_673_469_387_755_102_040_816_327,
];

/// One accepted piece of the integration range.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Panel {
    pub from: f64,
    pub to: f64,
    pub integral: f64,
}

/// The 15-point Kronrod estimate of the integral over [a, b] and the
/// difference from the embedded 7-point Gauss estimate (an error bound that
/// is pessimistic for smooth integrands).
pub fn kronrod15(f: &mut impl FnMut(f64) -> f64, a: f64, b: f64) -> (f64, f64) {
    let centre = 0.5 * (a + b);
    let half = 0.5 * (b - a);
    let fc = f(centre);
    let mut kronrod = KRONROD_WEIGHTS[7] * fc;
    let mut gauss = GAUSS_WEIGHTS[3] * fc;
    for j in 0..7 {
        let dx = half * KRONROD_NODES[j];
        let pair = f(centre - dx) + f(centre + dx);
        kronrod += KRONROD_WEIGHTS[j] * pair;
        if j % 2 == 1 {
            gauss += GAUSS_WEIGHTS[j / 2] * pair;
        }
    }
    (kronrod * half, ((kronrod - gauss) * half).abs())
}

/// Integrates `f` over the consecutive pieces between `breaks` (ascending,
/// at least two points), splitting panels until each meets its share of
/// `rel_tol` times the total. Returns the panels in ascending order.
///
/// Splitting at `breaks` matters where the integrand has a kink or a jump
/// (a calibration table's segments): no panel then straddles one.
pub fn integrate(f: &mut impl FnMut(f64) -> f64, breaks: &[f64], rel_tol: f64) -> Vec<Panel> {
    const MAX_PANELS: usize = 20_000;
    let (Some(&first), Some(&last)) = (breaks.first(), breaks.last()) else {
        return Vec::new();
    };
    let span = last - first;
    if span.is_nan() || span <= 0.0 {
        return Vec::new();
    }
    // A rough total first, so that the tolerance is relative to the whole.
    let rough: f64 = breaks
        .windows(2)
        .map(|w| kronrod15(f, w[0], w[1]).0.abs())
        .sum();
    let budget = rel_tol * rough.max(f64::MIN_POSITIVE);

    let mut accepted = Vec::new();
    let mut pending: Vec<(f64, f64)> = breaks.windows(2).rev().map(|w| (w[0], w[1])).collect();
    while let Some((a, b)) = pending.pop() {
        let (value, error) = kronrod15(f, a, b);
        let share = budget * (b - a) / span;
        let too_narrow = (b - a) <= 64.0 * f64::EPSILON * a.abs().max(b.abs()).max(1.0);
        if error <= share || too_narrow || accepted.len() + pending.len() >= MAX_PANELS {
            accepted.push(Panel {
                from: a,
                to: b,
                integral: value,
            });
        } else {
            let mid = 0.5 * (a + b);
            // Right half first onto the stack so the left half pops first,
            // keeping the accepted panels in ascending order.
            pending.push((mid, b));
            pending.push((a, mid));
        }
    }
    accepted
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn weights_sum_to_the_interval_length() {
        let k: f64 = 2.0 * KRONROD_WEIGHTS[..7].iter().sum::<f64>() + KRONROD_WEIGHTS[7];
        let g: f64 = 2.0 * GAUSS_WEIGHTS[..3].iter().sum::<f64>() + GAUSS_WEIGHTS[3];
        assert!(
            (k - 2.0).abs() < 1e-15 && (g - 2.0).abs() < 1e-15,
            "{k} {g}"
        );
    }

    #[test]
    fn rules_are_exact_for_the_polynomial_degrees_they_promise() {
        // Gauss with n points is exact to degree 2n - 1 = 13; Kronrod with
        // 2n + 1 points to degree 3n + 1 = 22 (analytic: the integral of x^p
        // over [0, 1] is 1/(p + 1)). A wrong digit in a node or weight
        // breaks exactness at the high degrees.
        for p in 0..=22 {
            let (k, diff) = kronrod15(&mut |x: f64| x.powi(p), 0.0, 1.0);
            let exact = 1.0 / (p as f64 + 1.0);
            assert!(
                ((k - exact) / exact).abs() < 1e-14,
                "Kronrod degree {p}: {k} vs {exact}"
            );
            if p <= 13 {
                assert!(diff < 1e-14, "Gauss degree {p} differs by {diff}");
            }
        }
    }

    #[test]
    fn adaptive_integration_meets_its_tolerance_on_a_peaked_integrand() {
        // Analytic: the integral of 1/(1e-4 + x²) over [-1, 1] is
        // 2 atan(1/0.01)/0.01.
        let mut f = |x: f64| 1.0 / (1e-4 + x * x);
        let panels = integrate(&mut f, &[-1.0, 1.0], 1e-12);
        let total: f64 = panels.iter().map(|p| p.integral).sum();
        let exact = 2.0 * (1.0f64 / 0.01).atan() / 0.01;
        assert!(
            ((total - exact) / exact).abs() < 1e-11,
            "{total} vs {exact}"
        );
        assert!(
            panels.windows(2).all(|w| w[0].to == w[1].from),
            "panels in order"
        );
    }
}
