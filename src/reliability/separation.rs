//! How far apart the two fitted laws are, and whether that is enough for the degree that
//! blocking produced.
//!
//! The Bhattacharyya coefficient B(P, Q) = sum_x sqrt(P(x) Q(x)) (Bhattacharyya 1943) of the
//! true-pair and false-pair laws factorises over conditionally independent fields, so each
//! field supplies -ln B_k nats of separation. In the planted matching model, one-to-one
//! recovery of all but a vanishing share of the true pairs is possible when sqrt(d) B <= 1 and
//! impossible when sqrt(d) B >= 1 + eps (Ding, Wu, Xu & Yang 2021, arXiv:2103.09383;
//! Moharrami, Moore & Xu 2019), where d is the mean number of false candidates per record.

use crate::model::Fit;
use serde::Serialize;

/// The Bhattacharyya coefficient of two discrete laws on the same points.
pub fn bhattacharyya(p: &[f64], q: &[f64]) -> f64 {
    p.iter().zip(q).map(|(a, b)| (a * b).sqrt()).sum()
}

/// The Bhattacharyya coefficient of two laws given by densities on a grid of equal spacing
/// `step` (midpoint rule), for continuous checks.
pub fn bhattacharyya_density<F, G>(p: F, q: G, lo: f64, hi: f64, steps: usize) -> f64
where
    F: Fn(f64) -> f64,
    G: Fn(f64) -> f64,
{
    let h = (hi - lo) / steps as f64;
    (0..steps)
        .map(|i| {
            let x = lo + (i as f64 + 0.5) * h;
            (p(x) * q(x)).sqrt() * h
        })
        .sum()
}

/// A field's full laws with "missing" as its own last point: observed levels scaled by the
/// share observed, then the missing share.
pub fn with_missing(levels: &[f64], missing: f64) -> Vec<f64> {
    let mut v: Vec<f64> = levels.iter().map(|x| x * (1.0 - missing)).collect();
    v.push(missing);
    v
}

/// One field's separation.
#[derive(Debug, Clone, Serialize)]
pub struct FieldSeparation {
    /// Field label.
    pub name: String,
    /// B_k, with missingness as its own level (and the exact level split by value when
    /// value-frequency weighting is on).
    pub bhattacharyya: f64,
    /// -ln B_k.
    pub nats: f64,
    /// True when the field adds (almost) nothing: B_k above [`USELESS_B`].
    pub adds_nothing: bool,
}

/// A field whose B_k is above this separates the classes by under 0.005 nats: it adds nothing.
pub const USELESS_B: f64 = 0.995;

/// Per-field B_k from a fit; `value_split` optionally replaces a field's B with one computed
/// with the exact level split by value.
pub fn field_separations(
    fit: &Fit,
    names: &[String],
    value_split: &[Option<f64>],
) -> Vec<FieldSeparation> {
    (0..fit.m.len())
        .map(|k| {
            let b = value_split.get(k).copied().flatten().unwrap_or_else(|| {
                bhattacharyya(
                    &with_missing(&fit.m[k], fit.m_missing[k]),
                    &with_missing(&fit.u[k], fit.u_missing[k]),
                )
            });
            let b = b.clamp(0.0, 1.0);
            FieldSeparation {
                name: names[k].clone(),
                bhattacharyya: b,
                nats: -b.max(1e-300).ln(),
                adds_nothing: b > USELESS_B,
            }
        })
        .collect()
}

/// B_k of a field whose exact-agreement level is split by value: the exact level's mass is
/// spread over values v with m(v) proportional to the value's share among true pairs and u(v)
/// to its share among false pairs (Fellegi & Sunter 1969 §3; Winkler 1989).
pub fn split_bhattacharyya(
    m: &[f64],
    u: &[f64],
    m_missing: f64,
    u_missing: f64,
    m_value_shares: &[f64],
    u_value_shares: &[f64],
) -> f64 {
    let mm = with_missing(m, m_missing);
    let uu = with_missing(u, u_missing);
    let exact: f64 = m_value_shares
        .iter()
        .zip(u_value_shares)
        .map(|(a, b)| (mm[0] * a * uu[0] * b).sqrt())
        .sum();
    exact + bhattacharyya(&mm[1..], &uu[1..])
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn two_exponentials_closed_form() {
        // Rates a, b: B = 2 sqrt(ab) / (a + b) (Kailath 1967, IEEE Trans. Commun. Technol.
        // 15:52; also METHOD §5).
        for &(a, b) in &[(1.0, 2.0), (0.5, 4.0), (3.0, 3.0)] {
            let want = 2.0 * f64::sqrt(a * b) / (a + b);
            let got = bhattacharyya_density(
                |x| a * (-a * x).exp(),
                |x| b * (-b * x).exp(),
                0.0,
                60.0,
                400_000,
            );
            assert!((got - want).abs() < 1e-6, "{a},{b}: {got} vs {want}");
        }
    }

    #[test]
    fn two_normals_closed_form() {
        // B = sqrt(2 s1 s2 / (s1^2 + s2^2)) exp(-(mu1 - mu2)^2 / (4 (s1^2 + s2^2)))
        // (Bhattacharyya 1943; Kailath 1967).
        let pdf = |mu: f64, s: f64| {
            move |x: f64| {
                (-(x - mu).powi(2) / (2.0 * s * s)).exp()
                    / (s * (2.0 * std::f64::consts::PI).sqrt())
            }
        };
        for &(m1, s1, m2, s2) in &[
            (0.0f64, 1.0f64, 1.0f64, 1.0f64),
            (0.0, 1.0, 3.0, 2.0),
            (-1.0, 0.5, 0.5, 1.5),
        ] {
            let want = (2.0 * s1 * s2 / (s1 * s1 + s2 * s2)).sqrt()
                * (-(m1 - m2) * (m1 - m2) / (4.0 * (s1 * s1 + s2 * s2))).exp();
            let got = bhattacharyya_density(pdf(m1, s1), pdf(m2, s2), -30.0, 30.0, 200_000);
            assert!((got - want).abs() < 1e-8, "{got} vs {want}");
        }
    }

    #[test]
    fn two_bernoullis_closed_form() {
        // B = sqrt(p q) + sqrt((1 - p)(1 - q)), the definition on two points.
        for &(p, q) in &[(0.9, 0.1), (0.5, 0.5), (0.99, 0.02)] {
            let want = f64::sqrt(p * q) + f64::sqrt((1.0 - p) * (1.0 - q));
            assert!((bhattacharyya(&[p, 1.0 - p], &[q, 1.0 - q]) - want).abs() < 1e-15);
        }
        assert!((bhattacharyya(&[0.5, 0.5], &[0.5, 0.5]) - 1.0).abs() < 1e-15);
    }

    #[test]
    fn planted_exponential_margin() {
        // P = Exp(lambda), Q = Exp(1/n) on the complete graph (d = n): sqrt(n) B = 2/sqrt(lambda)
        // as n grows, so the threshold sqrt(d) B = 1 falls at lambda = 4 (Moharrami, Moore & Xu
        // 2019; Ding, Wu, Xu & Yang 2021).
        // Computed with the numeric routine, not the closed form.
        let n: f64 = 1e8;
        for &lambda in &[2.0, 4.0, 8.0] {
            let b = bhattacharyya_density(
                |x| lambda * (-lambda * x).exp(),
                |x| (-x / n).exp() / n,
                0.0,
                80.0,
                400_000,
            );
            let margin = n.sqrt() * b;
            assert!(
                (margin - 2.0 / lambda.sqrt()).abs() < 1e-6,
                "{lambda}: {margin}"
            );
        }
        assert!((2.0 / f64::sqrt(4.0) - 1.0).abs() < 1e-12);
    }

    #[test]
    fn missing_level_reduces_separation() {
        let m = [0.9, 0.1];
        let u = [0.1, 0.9];
        let b0 = bhattacharyya(&m, &u);
        let b1 = bhattacharyya(&with_missing(&m, 0.3), &with_missing(&u, 0.3));
        // With equal missing shares r: B = r + (1 - r) B_observed.
        assert!((b1 - (0.3 + 0.7 * b0)).abs() < 1e-12);
    }
}
