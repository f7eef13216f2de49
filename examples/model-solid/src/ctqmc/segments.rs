//! Segment configurations of one spin flavour on the imaginary-time circle [0, β).
//!
//! Owns the geometry of the segment picture (Werner, Comanac, de' Medici, Troyer, Millis,
//! PRL 97, 076405 (2006)): a flavour is either empty, fully occupied (the "full line"), or
//! a set of non-overlapping segments [start, end) in which the orbital is occupied. Segments
//! are kept sorted by start; only the last may wind through β (end < start).

/// Reduce a time into [0, β) given that it lies in (−β, 2β).
#[inline]
pub(crate) fn wrap(t: f64, beta: f64) -> f64 {
    if t >= beta {
        t - beta
    } else if t < 0.0 {
        t + beta
    } else {
        t
    }
}

/// Overlap of the linear intervals [a0, a1) and [b0, b1).
#[inline]
fn linear_overlap(a0: f64, a1: f64, b0: f64, b1: f64) -> f64 {
    (a1.min(b1) - a0.max(b0)).max(0.0)
}

/// Split the cyclic interval [a, a+l) (a in [0, β), 0 ≤ l ≤ β) into at most two linear pieces.
#[inline]
fn pieces(a: f64, l: f64, beta: f64) -> [(f64, f64); 2] {
    let end = a + l;
    if end > beta {
        [(a, beta), (0.0, end - beta)]
    } else {
        [(a, end), (0.0, 0.0)]
    }
}

/// Overlap of two cyclic intervals [a, a+la) and [b, b+lb) on the circle of length β.
#[inline]
pub(crate) fn cyclic_overlap(a: f64, la: f64, b: f64, lb: f64, beta: f64) -> f64 {
    let pa = pieces(a, la, beta);
    let pb = pieces(b, lb, beta);
    let mut s = 0.0;
    for x in &pa {
        for y in &pb {
            s += linear_overlap(x.0, x.1, y.0, y.1);
        }
    }
    s
}

/// Where a time falls in a flavour's configuration.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) enum Place {
    /// No segments, orbital empty.
    Empty,
    /// No segments, orbital occupied at all times.
    Full,
    /// Inside segment `idx`.
    Inside(usize),
    /// In the gap that ends at the start of segment `next`.
    Outside { next: usize },
}

/// One flavour's segments.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Flavour {
    beta: f64,
    /// (start, end) pairs sorted by start; end < start only for the last segment.
    segs: Vec<(f64, f64)>,
    /// Occupied at all times (meaningful only when `segs` is empty).
    full: bool,
}

impl Flavour {
    pub(crate) fn empty(beta: f64) -> Self {
        Self {
            beta,
            segs: Vec::new(),
            full: false,
        }
    }

    pub(crate) fn order(&self) -> usize {
        self.segs.len()
    }

    pub(crate) fn is_full(&self) -> bool {
        self.segs.is_empty() && self.full
    }

    pub(crate) fn segments(&self) -> &[(f64, f64)] {
        &self.segs
    }

    /// Segment `i` (start, end).
    pub(crate) fn seg(&self, i: usize) -> (f64, f64) {
        self.segs[i]
    }

    /// Length of segment `i`.
    pub(crate) fn seg_len(&self, i: usize) -> f64 {
        let (s, e) = self.segs[i];
        wrap(e - s, self.beta)
    }

    /// Total occupied time.
    pub(crate) fn occupied_length(&self) -> f64 {
        if self.is_full() {
            return self.beta;
        }
        (0..self.segs.len()).map(|i| self.seg_len(i)).sum()
    }

    /// Locate a time t in [0, β).
    pub(crate) fn locate(&self, t: f64) -> Place {
        let k = self.segs.len();
        if k == 0 {
            return if self.full { Place::Full } else { Place::Empty };
        }
        // Last segment starting at or before t; if none, the last one (which may wind).
        let p = self.segs.partition_point(|s| s.0 <= t);
        let i = if p == 0 { k - 1 } else { p - 1 };
        let d = wrap(t - self.segs[i].0, self.beta);
        if d < self.seg_len(i) {
            Place::Inside(i)
        } else {
            Place::Outside { next: (i + 1) % k }
        }
    }

    /// Occupied time inside the cyclic interval [a, a+l).
    pub(crate) fn overlap_with(&self, a: f64, l: f64) -> f64 {
        if self.segs.is_empty() {
            return if self.full { l } else { 0.0 };
        }
        let mut s = 0.0;
        for i in 0..self.segs.len() {
            s += cyclic_overlap(a, l, self.segs[i].0, self.seg_len(i), self.beta);
        }
        s
    }

    /// Insert a segment (start, end) into a gap (the caller checked that it fits).
    pub(crate) fn insert(&mut self, start: f64, end: f64) {
        let p = self.segs.partition_point(|s| s.0 < start);
        self.segs.insert(p, (start, end));
        self.full = false;
    }

    /// Remove segment `i`; if it was the last one, the orbital becomes empty.
    pub(crate) fn remove(&mut self, i: usize) {
        self.segs.remove(i);
        self.full = false;
    }

    /// Cut the hole [end, start) out of segment `i` (or out of the full line when there are
    /// no segments): the occupied region before the hole ends at `end`, the one after it
    /// starts at `start`.
    pub(crate) fn cut(&mut self, i: Option<usize>, end: f64, start: f64) {
        match i {
            None => {
                self.segs.clear();
                self.segs.push((start, end));
                self.full = false;
            }
            Some(i) => {
                let (s0, e0) = self.segs.remove(i);
                self.insert(s0, end);
                self.insert(start, e0);
            }
        }
    }

    /// Remove the hole after segment `i`, merging it with the next segment; with a single
    /// segment the orbital becomes fully occupied.
    pub(crate) fn merge(&mut self, i: usize) {
        let k = self.segs.len();
        if k == 1 {
            self.segs.clear();
            self.full = true;
            return;
        }
        let j = (i + 1) % k;
        let (s_i, _) = self.segs[i];
        let (_, e_j) = self.segs[j];
        let (hi, lo) = if i > j { (i, j) } else { (j, i) };
        self.segs.remove(hi);
        self.segs.remove(lo);
        self.insert(s_i, e_j);
    }

    /// Check the invariants (sorted, non-overlapping, at most the last segment winds).
    #[cfg(test)]
    pub(crate) fn is_consistent(&self) -> bool {
        let k = self.segs.len();
        for i in 0..k {
            let (s, e) = self.segs[i];
            if !(0.0..self.beta).contains(&s) || !(0.0..self.beta).contains(&e) {
                return false;
            }
            if e < s && i + 1 != k {
                return false;
            }
            if i + 1 < k && !(e <= self.segs[i + 1].0 && s < self.segs[i + 1].0) {
                return false;
            }
        }
        if k > 1 {
            let (s_last, e_last) = self.segs[k - 1];
            if e_last < s_last && e_last > self.segs[0].0 {
                return false;
            }
        }
        true
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cyclic_overlaps() {
        let b = 10.0;
        assert!((cyclic_overlap(1.0, 2.0, 2.0, 5.0, b) - 1.0).abs() < 1e-15);
        assert!((cyclic_overlap(9.0, 2.0, 0.0, 0.5, b) - 0.5).abs() < 1e-15);
        assert!((cyclic_overlap(9.0, 2.0, 8.5, 3.0, b) - 2.0).abs() < 1e-15);
        assert!((cyclic_overlap(0.0, 10.0, 3.0, 9.0, b) - 9.0).abs() < 1e-12);
    }

    #[test]
    fn locate_cut_merge() {
        let mut f = Flavour::empty(10.0);
        f.insert(8.0, 1.0); // winds through β
        f.insert(3.0, 4.0);
        assert!(f.is_consistent());
        assert_eq!(f.locate(0.5), Place::Inside(1));
        assert_eq!(f.locate(9.0), Place::Inside(1));
        assert_eq!(f.locate(2.0), Place::Outside { next: 0 });
        assert_eq!(f.locate(5.0), Place::Outside { next: 1 });
        assert!((f.occupied_length() - 4.0).abs() < 1e-15);
        assert!((f.overlap_with(0.0, 3.5) - 1.5).abs() < 1e-15);
        f.cut(Some(1), 9.0, 0.5);
        assert!(f.is_consistent());
        assert_eq!(f.segments(), &[(0.5, 1.0), (3.0, 4.0), (8.0, 9.0)]);
        f.merge(2);
        assert_eq!(f.segments(), &[(3.0, 4.0), (8.0, 1.0)]);
        f.merge(0);
        assert_eq!(f.segments(), &[(3.0, 1.0)]);
        f.merge(0);
        assert!(f.is_full() && f.locate(2.0) == Place::Full);
    }
}
