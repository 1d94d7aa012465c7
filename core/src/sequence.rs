//! Measurement sequences: the ordered list of four-electrode measurements
//! (quadrupoles) a meter runs on a line.
//!
//! A quadrupole drives current I through electrodes A and B and measures the
//! potential difference U = V(M) − V(N); the transfer resistance is R = U/I (Ω).
//! Electrodes are referred to by their 0-based index in cable order (see
//! [`crate::geometry::LineGeometry`]). `b` or `n` may be absent: a remote
//! electrode "at infinity" (pole arrays).
//!
//! By reciprocity (linear, isotropic ground) swapping the current and potential
//! dipoles leaves R unchanged: R(ABMN) = R(MNAB). A sequence records which of its
//! quadrupoles are reciprocals of which, for quality control.

use std::collections::HashMap;
use std::f64::consts::PI;

use thiserror::Error;

use crate::geometry::LineGeometry;

/// One four-electrode measurement: current through `a`→`b`, potential across `m`–`n`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct Quadrupole {
    /// Current electrode A (index in cable order).
    pub a: usize,
    /// Current electrode B, `None` for a remote electrode.
    pub b: Option<usize>,
    /// Potential electrode M.
    pub m: usize,
    /// Potential electrode N, `None` for a remote electrode.
    pub n: Option<usize>,
}

impl Quadrupole {
    /// A quadrupole with all four electrodes on the line.
    pub fn new(a: usize, b: usize, m: usize, n: usize) -> Self {
        Self { a, b: Some(b), m, n: Some(n) }
    }

    /// The reciprocal measurement: current through M→N, potential across A–B.
    pub fn reciprocal(&self) -> Quadrupole {
        Quadrupole { a: self.m, b: self.n, m: self.a, n: self.b }
    }

    /// The electrodes in use, in the order a, b, m, n (remote ones skipped).
    pub fn electrodes(&self) -> impl Iterator<Item = usize> + '_ {
        [Some(self.a), self.b, Some(self.m), self.n].into_iter().flatten()
    }

    /// True when the quadrupole uses electrode `e`.
    pub fn uses(&self, e: usize) -> bool {
        self.electrodes().any(|x| x == e)
    }

    /// Canonical key under which a measurement and its reciprocal coincide.
    /// R is unchanged by swapping the dipoles and by flipping both dipoles'
    /// polarity, so the key is the smallest of those four arrangements.
    fn reciprocal_key(&self) -> (Dipole, Dipole) {
        let d1 = Dipole(Some(self.a), self.b);
        let d2 = Dipole(Some(self.m), self.n);
        [(d1, d2), (d2, d1), (d1.flipped(), d2.flipped()), (d2.flipped(), d1.flipped())]
            .into_iter()
            .min()
            .expect("four candidates")
    }
}

/// An ordered electrode pair (a dipole), `None` standing for a remote electrode.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
struct Dipole(Option<usize>, Option<usize>);

impl Dipole {
    fn flipped(self) -> Dipole {
        Dipole(self.1, self.0)
    }
}

/// Why a list of quadrupoles is not a valid sequence for a line.
#[derive(Debug, Error, PartialEq)]
pub enum SequenceError {
    /// The sequence is empty.
    #[error("the sequence holds no quadrupoles")]
    Empty,
    /// An electrode index is beyond the line.
    #[error(
        "quadrupole {index}: electrode {field} = {electrode} is beyond the line's {n_electrodes} electrodes"
    )]
    ElectrodeOutOfRange {
        /// Position of the quadrupole in the sequence (0-based).
        index: usize,
        /// `a`, `b`, `m` or `n`.
        field: &'static str,
        /// The offending electrode index.
        electrode: usize,
        /// Electrodes on the line.
        n_electrodes: usize,
    },
    /// The same electrode appears twice in one quadrupole.
    #[error("quadrupole {index}: electrodes a, b, m, n must be distinct")]
    NotDistinct {
        /// Position of the quadrupole in the sequence (0-based).
        index: usize,
    },
    /// The same quadrupole appears twice.
    #[error("quadrupole {index} repeats quadrupole {first}")]
    Duplicate {
        /// Position of the repeat (0-based).
        index: usize,
        /// Position of the first occurrence (0-based).
        first: usize,
    },
}

/// A validated sequence: every quadrupole uses distinct electrodes of the line,
/// no quadrupole is repeated. Reciprocal pairs are found on construction.
#[derive(Debug, Clone, PartialEq)]
pub struct Sequence {
    quadrupoles: Vec<Quadrupole>,
    n_electrodes: usize,
    reciprocal_of: Vec<Option<usize>>,
}

impl Sequence {
    /// Validates `quadrupoles` for a line of `n_electrodes` electrodes.
    pub fn new(quadrupoles: Vec<Quadrupole>, n_electrodes: usize) -> Result<Self, SequenceError> {
        if quadrupoles.is_empty() {
            return Err(SequenceError::Empty);
        }
        let mut seen: HashMap<Quadrupole, usize> = HashMap::with_capacity(quadrupoles.len());
        for (index, q) in quadrupoles.iter().enumerate() {
            for (field, e) in [("a", Some(q.a)), ("b", q.b), ("m", Some(q.m)), ("n", q.n)] {
                if let Some(e) = e
                    && e >= n_electrodes
                {
                    return Err(SequenceError::ElectrodeOutOfRange {
                        index,
                        field,
                        electrode: e,
                        n_electrodes,
                    });
                }
            }
            let used: Vec<usize> = q.electrodes().collect();
            for i in 0..used.len() {
                if used[i + 1..].contains(&used[i]) {
                    return Err(SequenceError::NotDistinct { index });
                }
            }
            if let Some(&first) = seen.get(q) {
                return Err(SequenceError::Duplicate { index, first });
            }
            seen.insert(*q, index);
        }
        let reciprocal_of = pair_reciprocals(&quadrupoles);
        Ok(Self { quadrupoles, n_electrodes, reciprocal_of })
    }

    /// The quadrupoles in measuring order.
    pub fn quadrupoles(&self) -> &[Quadrupole] {
        &self.quadrupoles
    }

    /// Number of quadrupoles.
    pub fn len(&self) -> usize {
        self.quadrupoles.len()
    }

    /// Always false: a valid sequence holds at least one quadrupole.
    pub fn is_empty(&self) -> bool {
        self.quadrupoles.is_empty()
    }

    /// Number of electrodes of the line this sequence was validated for.
    pub fn n_electrodes(&self) -> usize {
        self.n_electrodes
    }

    /// For quadrupole `i`, the index of its reciprocal in this sequence, if present.
    pub fn reciprocal_of(&self, i: usize) -> Option<usize> {
        self.reciprocal_of[i]
    }

    /// Index of this quadrupole in the sequence, if present.
    pub fn position(&self, q: &Quadrupole) -> Option<usize> {
        self.quadrupoles.iter().position(|x| x == q)
    }

    /// Reciprocal pairs `(normal, reciprocal)` with `normal < reciprocal`.
    pub fn reciprocal_pairs(&self) -> impl Iterator<Item = (usize, usize)> + '_ {
        self.reciprocal_of
            .iter()
            .enumerate()
            .filter_map(|(i, r)| r.filter(|&j| j > i).map(|j| (i, j)))
    }
}

/// Pairs each quadrupole with another of the list that measures the same
/// transfer resistance with current and potential dipoles swapped.
fn pair_reciprocals(quads: &[Quadrupole]) -> Vec<Option<usize>> {
    let mut by_key: HashMap<(Dipole, Dipole), Vec<usize>> = HashMap::new();
    for (i, q) in quads.iter().enumerate() {
        by_key.entry(q.reciprocal_key()).or_default().push(i);
    }
    let mut out = vec![None; quads.len()];
    for idx in by_key.values() {
        // Within one key, a reading and its reciprocal differ in which dipole
        // carries the current. Pair the first normal with the first reciprocal.
        let current = |i: usize| {
            let q = quads[i];
            let d = Dipole(Some(q.a), q.b);
            if d.flipped() < d { d.flipped() } else { d }
        };
        if idx.len() < 2 {
            continue;
        }
        let c0 = current(idx[0]);
        let (normals, recips): (Vec<usize>, Vec<usize>) =
            idx.iter().copied().partition(|&i| current(i) == c0);
        for (n, r) in normals.into_iter().zip(recips) {
            out[n] = Some(r);
            out[r] = Some(n);
        }
    }
    out
}

/// Geometric factor K (m) of a quadrupole with all electrodes on the surface of a
/// flat half-space: K = 2π / (1/AM − 1/AN − 1/BM + 1/BN), terms with a remote
/// electrode dropped. Apparent resistivity is ρa = K·R.
///
/// Returns `None` when the bracket vanishes (the potential electrodes lie on an
/// equipotential of the current dipole, so the measurement carries no signal on a
/// homogeneous earth).
pub fn geometric_factor_flat(line: &LineGeometry, q: &Quadrupole) -> Option<f64> {
    let d = |i: usize, j: usize| line.distance(i, j);
    let mut g = 1.0 / d(q.a, q.m);
    if let Some(n) = q.n {
        g -= 1.0 / d(q.a, n);
    }
    if let Some(b) = q.b {
        g -= 1.0 / d(b, q.m);
        if let Some(n) = q.n {
            g += 1.0 / d(b, n);
        }
    }
    let k = 2.0 * PI / g;
    (g.abs() > 1e-12 * (1.0 / line.min_spacing())).then_some(k)
}

/// Geometric factor K (m) of a quadrupole whose electrodes may be buried
/// below flat ground at elevation `ground_z` (m), by the image method
/// (METHODS §2.1): K = 4π / Σ s_ij (1/r_ij + 1/r′_ij), r′ the distance from the
/// potential electrode to the current electrode's image mirrored in the
/// ground surface, s = +1 for AM, BN and −1 for AN, BM. Equals
/// [`geometric_factor_flat`] when every electrode is on the surface.
///
/// Returns `None` when the bracket vanishes.
pub fn geometric_factor_buried(line: &LineGeometry, ground_z: f64, q: &Quadrupole) -> Option<f64> {
    let e = line.electrodes();
    let term = |c: usize, p: usize| {
        let (cx, cz, px, pz) = (e[c].x(), e[c].z(), e[p].x(), e[p].z());
        1.0 / (px - cx).hypot(pz - cz) + 1.0 / (px - cx).hypot(pz - (2.0 * ground_z - cz))
    };
    let mut g = term(q.a, q.m);
    if let Some(n) = q.n {
        g -= term(q.a, n);
    }
    if let Some(b) = q.b {
        g -= term(b, q.m);
        if let Some(n) = q.n {
            g += term(b, n);
        }
    }
    (g.abs() > 1e-12 * (1.0 / line.min_spacing())).then_some(4.0 * PI / g)
}

/// Wenner-α quadrupoles (A M N B, all gaps a) for a = 1..=`max_a` electrode
/// spacings.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct WennerParams {
    /// Largest dipole length a, in electrode spacings (≥ 1).
    pub max_a: usize,
}

/// Wenner–Schlumberger quadrupoles (A M N B with MN = a, AM = NB = n·a).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SchlumbergerParams {
    /// Largest MN length a, in electrode spacings (≥ 1).
    pub max_a: usize,
    /// Largest n (≥ 1).
    pub max_n: usize,
}

/// Dipole–dipole quadrupoles (B A M N with AB = MN = a, AM = n·a).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct DipoleDipoleParams {
    /// Largest dipole length a, in electrode spacings (≥ 1).
    pub max_a: usize,
    /// Largest n (≥ 1).
    pub max_n: usize,
}

/// Multiple-gradient quadrupoles (Dahlin & Zhou 2006, *Near Surface
/// Geophysics* 4, 113–123): current electrodes (s + 2)·a apart, potential
/// dipoles of length a stepping between them (M = A + k·a, N = M + a,
/// k = 1..=s).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct GradientParams {
    /// Largest potential dipole length a, in electrode spacings (≥ 1).
    pub max_a: usize,
    /// Separation factor s: potential dipoles per current pair (≥ 1).
    pub s: usize,
}

/// Pole–dipole quadrupoles (A, remote B, M = A + n·a, N = M + a), forward
/// direction only.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct PoleDipoleParams {
    /// Largest dipole length a, in electrode spacings (≥ 1).
    pub max_a: usize,
    /// Largest n (≥ 1).
    pub max_n: usize,
}

/// Pole–pole quadrupoles (A, M = A + a, B and N remote).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct PolePoleParams {
    /// Largest separation a, in electrode spacings (≥ 1).
    pub max_a: usize,
}

/// Wenner-α quadrupoles on a line of `n_electrodes`, ordered by a, then by
/// position. Count: Σ_{a=1}^{max_a} max(0, N − 3a).
pub fn wenner(n_electrodes: usize, p: &WennerParams) -> Vec<Quadrupole> {
    let mut out = Vec::new();
    for a in 1..=p.max_a {
        for i in 0..n_electrodes.saturating_sub(3 * a) {
            out.push(Quadrupole::new(i, i + 3 * a, i + a, i + 2 * a));
        }
    }
    out
}

/// Wenner–Schlumberger quadrupoles, ordered by a, n, position. Count:
/// Σ_a Σ_n max(0, N − (2n + 1)a).
pub fn schlumberger(n_electrodes: usize, p: &SchlumbergerParams) -> Vec<Quadrupole> {
    let mut out = Vec::new();
    for a in 1..=p.max_a {
        for n in 1..=p.max_n {
            let span = (2 * n + 1) * a;
            for i in 0..n_electrodes.saturating_sub(span) {
                out.push(Quadrupole::new(i, i + span, i + n * a, i + n * a + a));
            }
        }
    }
    out
}

/// Dipole–dipole quadrupoles (current B→A… ordered so K > 0), ordered by a,
/// n, position. Count: Σ_a Σ_n max(0, N − (n + 2)a).
pub fn dipole_dipole(n_electrodes: usize, p: &DipoleDipoleParams) -> Vec<Quadrupole> {
    let mut out = Vec::new();
    for a in 1..=p.max_a {
        for n in 1..=p.max_n {
            let span = (n + 2) * a;
            for i in 0..n_electrodes.saturating_sub(span) {
                let m = i + a + n * a;
                out.push(Quadrupole::new(i + a, i, m, m + a));
            }
        }
    }
    out
}

/// Multiple-gradient quadrupoles, ordered by a, current position, potential
/// dipole. Count: Σ_a s·max(0, N − (s + 2)a).
pub fn gradient(n_electrodes: usize, p: &GradientParams) -> Vec<Quadrupole> {
    let mut out = Vec::new();
    for a in 1..=p.max_a {
        let span = (p.s + 2) * a;
        for i in 0..n_electrodes.saturating_sub(span) {
            for k in 1..=p.s {
                out.push(Quadrupole::new(i, i + span, i + k * a, i + (k + 1) * a));
            }
        }
    }
    out
}

/// Pole–dipole quadrupoles, ordered by a, n, position. Count:
/// Σ_a Σ_n max(0, N − (n + 1)a).
pub fn pole_dipole(n_electrodes: usize, p: &PoleDipoleParams) -> Vec<Quadrupole> {
    let mut out = Vec::new();
    for a in 1..=p.max_a {
        for n in 1..=p.max_n {
            let span = (n + 1) * a;
            for i in 0..n_electrodes.saturating_sub(span) {
                out.push(Quadrupole { a: i, b: None, m: i + n * a, n: Some(i + span) });
            }
        }
    }
    out
}

/// Pole–pole quadrupoles, ordered by a, position. Count: Σ_a max(0, N − a).
pub fn pole_pole(n_electrodes: usize, p: &PolePoleParams) -> Vec<Quadrupole> {
    let mut out = Vec::new();
    for a in 1..=p.max_a {
        for i in 0..n_electrodes.saturating_sub(a) {
            out.push(Quadrupole { a: i, b: None, m: i + a, n: None });
        }
    }
    out
}

/// Concatenates quadrupole lists, dropping repeats and any quadrupole that
/// measures the same as an earlier one (its reciprocal or a polarity flip of
/// either), so the result is a valid [`Sequence`] without accidental
/// duplicates.
pub fn merge(lists: &[Vec<Quadrupole>]) -> Vec<Quadrupole> {
    let mut seen = std::collections::HashSet::new();
    let mut out = Vec::new();
    for q in lists.iter().flatten() {
        if seen.insert(q.reciprocal_key()) {
            out.push(*q);
        }
    }
    out
}

/// The quadrupoles followed by the reciprocal (current and potential dipoles
/// swapped) of each, for reciprocal-error measurements. Count: 2 × input.
pub fn with_reciprocals(quadrupoles: &[Quadrupole]) -> Vec<Quadrupole> {
    let mut out = quadrupoles.to_vec();
    out.extend(quadrupoles.iter().map(Quadrupole::reciprocal));
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::geometry::Electrode;

    fn flat_line(n: usize, a: f64) -> LineGeometry {
        LineGeometry::new(
            (0..n).map(|i| Electrode::new(format!("{}", i + 1), i as f64 * a, 0.0)).collect(),
        )
        .unwrap()
    }

    #[test]
    fn wenner_factor_is_two_pi_a() {
        // Wenner alpha K = 2πa (any textbook, e.g. Telford, Geldart & Sheriff 1990).
        let line = flat_line(8, 2.0);
        let k = geometric_factor_flat(&line, &Quadrupole::new(0, 3, 1, 2)).unwrap();
        assert!((k - 2.0 * PI * 2.0).abs() < 1e-12, "{k}");
    }

    #[test]
    fn validation_names_the_quadrupole_and_field() {
        let q = vec![Quadrupole::new(0, 1, 2, 3), Quadrupole::new(0, 1, 2, 9)];
        assert_eq!(
            Sequence::new(q, 8),
            Err(SequenceError::ElectrodeOutOfRange {
                index: 1,
                field: "n",
                electrode: 9,
                n_electrodes: 8
            })
        );
        let q = vec![Quadrupole::new(0, 1, 1, 3)];
        assert_eq!(Sequence::new(q, 8), Err(SequenceError::NotDistinct { index: 0 }));
        let q = vec![Quadrupole::new(0, 1, 2, 3), Quadrupole::new(0, 1, 2, 3)];
        assert_eq!(Sequence::new(q, 8), Err(SequenceError::Duplicate { index: 1, first: 0 }));
        assert_eq!(Sequence::new(vec![], 8), Err(SequenceError::Empty));
    }

    #[test]
    fn reciprocals_are_paired_in_either_polarity() {
        let q = vec![
            Quadrupole::new(0, 1, 2, 3),
            Quadrupole::new(4, 5, 6, 7),
            Quadrupole::new(2, 3, 0, 1), // reciprocal of #0
            Quadrupole::new(7, 6, 5, 4), // reciprocal of #1 with both dipoles flipped
            Quadrupole::new(0, 2, 1, 3), // no reciprocal
        ];
        let s = Sequence::new(q, 8).unwrap();
        assert_eq!(s.reciprocal_of(0), Some(2));
        assert_eq!(s.reciprocal_of(2), Some(0));
        assert_eq!(s.reciprocal_of(1), Some(3));
        assert_eq!(s.reciprocal_of(4), None);
        assert_eq!(s.reciprocal_pairs().collect::<Vec<_>>(), vec![(0, 2), (1, 3)]);
    }

    /// Checks a generator's count against its formula and every K against
    /// the closed form for its array, to 1e-12 relative.
    fn check(
        quads: &[Quadrupole],
        count: usize,
        line: &LineGeometry,
        k: impl Fn(&Quadrupole) -> f64,
    ) {
        assert_eq!(quads.len(), count);
        assert!(Sequence::new(quads.to_vec(), line.len()).is_ok());
        for q in quads {
            let got = geometric_factor_flat(line, q).unwrap();
            let want = k(q);
            assert!((got / want - 1.0).abs() < 1e-12, "{q:?}: {got} vs {want}");
        }
    }

    #[test]
    fn generators_count_and_closed_form_factors() {
        // Closed-form K (Telford, Geldart & Sheriff 1990; METHODS §2.1):
        // Wenner 2πa, Schlumberger π(L² − ℓ²)/(4ℓ) with L = AB, ℓ = MN,
        // dipole–dipole πn(n+1)(n+2)a, pole–dipole 2πn(n+1)a, pole–pole 2πa,
        // gradient from the four distances (no closed form).
        let (ne, sp) = (24, 0.5);
        let line = flat_line(ne, sp);
        let x = |i: usize| i as f64 * sp;
        let sum = |f: &dyn Fn(usize) -> usize, n: usize| (1..=n).map(f).sum::<usize>();
        let w = wenner(ne, &WennerParams { max_a: 7 });
        check(&w, sum(&|a| ne.saturating_sub(3 * a), 7), &line, |q| 2.0 * PI * (x(q.m) - x(q.a)));
        let s = schlumberger(ne, &SchlumbergerParams { max_a: 2, max_n: 5 });
        let count = sum(&|a| sum(&|n| ne.saturating_sub((2 * n + 1) * a), 5), 2);
        check(&s, count, &line, |q| {
            let (l, m) = (x(q.b.unwrap()) - x(q.a), x(q.n.unwrap()) - x(q.m));
            PI * (l * l - m * m) / (4.0 * m)
        });
        let d = dipole_dipole(ne, &DipoleDipoleParams { max_a: 3, max_n: 6 });
        let count = sum(&|a| sum(&|n| ne.saturating_sub((n + 2) * a), 6), 3);
        check(&d, count, &line, |q| {
            let a = x(q.a) - x(q.b.unwrap());
            let n = ((x(q.m) - x(q.a)) / a).round();
            PI * n * (n + 1.0) * (n + 2.0) * a
        });
        let p = pole_dipole(ne, &PoleDipoleParams { max_a: 2, max_n: 4 });
        let count = sum(&|a| sum(&|n| ne.saturating_sub((n + 1) * a), 4), 2);
        check(&p, count, &line, |q| {
            let a = x(q.n.unwrap()) - x(q.m);
            let n = ((x(q.m) - x(q.a)) / a).round();
            2.0 * PI * n * (n + 1.0) * a
        });
        let pp = pole_pole(ne, &PolePoleParams { max_a: 5 });
        check(&pp, sum(&|a| ne - a, 5), &line, |q| 2.0 * PI * (x(q.m) - x(q.a)));
        let g = gradient(ne, &GradientParams { max_a: 2, s: 6 });
        let count = sum(&|a| 6 * ne.saturating_sub(8 * a), 2);
        check(&g, count, &line, |q| {
            let (a, b, m, n) = (x(q.a), x(q.b.unwrap()), x(q.m), x(q.n.unwrap()));
            2.0 * PI / (1.0 / (m - a) - 1.0 / (n - a) - 1.0 / (b - m) + 1.0 / (b - n))
        });
        // Tabulated checks (METHODS §2.1, a = 1): dipole–dipole n = 6 → 1055.58,
        // Wenner–Schlumberger n = 6 → 131.95.
        let unit = flat_line(16, 1.0);
        let dd6 = geometric_factor_flat(&unit, &Quadrupole::new(1, 0, 7, 8)).unwrap();
        assert!((dd6 - 1055.58).abs() < 0.005);
        let ws6 = geometric_factor_flat(&unit, &Quadrupole::new(0, 13, 6, 7));
        assert!(ws6.is_some_and(|k| (k - 131.95).abs() < 0.005), "{ws6:?}");
        // Reciprocals double the count and pair up; merge drops repeats.
        let r = with_reciprocals(&w);
        let seq = Sequence::new(r, ne).unwrap();
        assert_eq!(seq.reciprocal_pairs().count(), w.len());
        assert_eq!(merge(&[w.clone(), w.clone()]).len(), w.len());
    }

    #[test]
    fn buried_factors_match_the_image_method_values() {
        // METHODS §2.1 [C], Wenner a = 1 m with all electrodes at depth h:
        // h = 0.1 → 6.391, 0.25 → 6.910, 0.5 → 8.268, 1.0 → 10.584, 5.0 → 12.530;
        // dipole–dipole n = 1: h = 0.25 → 21.43, 0.5 → 27.19. Printed digits.
        for (h, k) in [(0.1, 6.391), (0.25, 6.910), (0.5, 8.268), (1.0, 10.584), (5.0, 12.530)] {
            let line = LineGeometry::new(
                (0..4).map(|i| Electrode::new(format!("{i}"), i as f64, -h)).collect(),
            )
            .unwrap();
            let got = geometric_factor_buried(&line, 0.0, &Quadrupole::new(0, 3, 1, 2)).unwrap();
            assert!((got - k).abs() < 6e-4, "h = {h}: {got}");
        }
        for (h, k) in [(0.25, 21.43), (0.5, 27.19)] {
            let line = LineGeometry::new(
                (0..4).map(|i| Electrode::new(format!("{i}"), i as f64, -h)).collect(),
            )
            .unwrap();
            let got = geometric_factor_buried(&line, 0.0, &Quadrupole::new(1, 0, 2, 3)).unwrap();
            assert!((got.abs() - k).abs() < 6e-3, "h = {h}: {got}");
        }
        // On the surface the image formula equals the flat formula.
        let line = flat_line(8, 1.0);
        let q = Quadrupole::new(0, 7, 2, 4);
        let (a, b) = (geometric_factor_buried(&line, 0.0, &q), geometric_factor_flat(&line, &q));
        assert!((a.unwrap() / b.unwrap() - 1.0).abs() < 1e-12);
    }
}
