// Matrix code: index loops mirror the maths (rows, columns) more clearly than iterators.
#![allow(clippy::needless_range_loop)]

//! The node equations' matrix: banded, its shape found at set-up from the parts' connections. Each node meets
//! only its neighbours in signal order, so row i holds entries from column `first[i]` to `last[i]`, a few either
//! side of the diagonal. Gaussian elimination without row exchanges keeps every fill-in inside that envelope
//! (a row's first entry never moves left, a column's first entry never moves up), so the elimination loops only
//! over the envelope. A pivot that is not clearly positive hands the step to a dense solve with partial pivoting.

use crate::lane::Lane;

/// The band of an n x n matrix: how far below and above the diagonal its entries reach, and the storage layout.
///
/// Storage is row-major with a symmetric half-width `half` (at least the wider of `below` and `above`): row i
/// holds columns i - half ..= i + half, so each row is one contiguous run of 2 half + 1 values. `half` rows of the
/// identity follow the n rows, so elimination and back substitution run whole rows without bounds at the end.
/// Half-widths are taken from `HALF_WIDTHS` so the hot loops are compiled for each (`solve::<K, L>`).
#[derive(Clone, Debug, PartialEq)]
pub struct BandShape {
    pub size: usize,
    /// Entries below and above the diagonal in the widest row and column.
    pub below: usize,
    pub above: usize,
    /// The storage half-width (one of `HALF_WIDTHS`).
    pub half: usize,
}

/// The storage half-widths the solver is compiled for.
pub const HALF_WIDTHS: [usize; 5] = [1, 2, 3, 4, 6];

impl BandShape {
    /// The shape holding every (row, column) in `entries` (the diagonal is always included); None when the band
    /// is wider than the widest layout (a circuit whose nodes are not in a chain).
    pub fn new(
        size: usize,
        entries: impl IntoIterator<Item = (usize, usize)>,
    ) -> Option<BandShape> {
        let (mut below, mut above) = (0, 0);
        for (i, j) in entries {
            if i > j {
                below = below.max(i - j);
            } else {
                above = above.max(j - i);
            }
        }
        let half = *HALF_WIDTHS.iter().find(|&&h| h >= below.max(above))?;
        Some(BandShape {
            size,
            below,
            above,
            half,
        })
    }

    /// Stored entries per row.
    pub fn width(&self) -> usize {
        2 * self.half + 1
    }

    /// Stored rows (the n rows and the identity rows after them).
    pub fn rows(&self) -> usize {
        self.size + self.half
    }

    /// Position of (i, j) in the storage; (i, j) must lie within the half-width.
    #[inline(always)]
    pub fn at(&self, i: usize, j: usize) -> usize {
        debug_assert!(self.holds(i, j), "({i}, {j}) outside the band");
        i * self.width() + j + self.half - i
    }

    /// True when (i, j) lies within the stored band.
    pub fn holds(&self, i: usize, j: usize) -> bool {
        j + self.half >= i && j <= i + self.half
    }

    /// Copy model `lane` of the band matrix `a` into the dense n x n `dense` (row-major).
    pub fn to_dense<L: Lane>(&self, a: &[L], lane: usize, dense: &mut [f64]) {
        let n = self.size;
        dense[..n * n].iter_mut().for_each(|v| *v = 0.0);
        for i in 0..n {
            let from = i.saturating_sub(self.half);
            let to = (i + self.half).min(n - 1);
            for j in from..=to {
                dense[i * n + j] = a[self.at(i, j)].get(lane);
            }
        }
    }
}

/// Solve `a x = y` for the n unknowns, overwriting `a` and `y` (x ends in `y`), by Gaussian elimination in the
/// band without row exchanges. `W` is the stored row width (2 half + 1): `a` in `BandShape` storage with its
/// identity rows, `y` with half-width zeros after the n values. Returns false, with `a` and `y` spoilt, when a
/// pivot of some lane is not clearly positive (then use `dense_solve`).
#[inline(always)]
pub fn solve<const W: usize, L: Lane>(
    n: usize,
    a: &mut [L],
    y: &mut [L],
    inverse_pivots: &mut [L],
) -> bool {
    let k = W / 2;
    // Checked once here; the loops below index only within these lengths.
    assert!(a.len() >= (n + k) * W && y.len() >= n + k && inverse_pivots.len() >= n);
    let tiny = L::splat(1e-300);
    let mut ok = L::lt(L::splat(0.0), L::splat(1.0));
    let a = a.as_mut_ptr();
    let y = y.as_mut_ptr();
    let inverse_pivots = inverse_pivots.as_mut_ptr();
    // SAFETY: p < n and d, e <= k, so every index is below (n + k) W for `a` and below n + k for `y`, as
    // asserted above.
    unsafe {
        for p in 0..n {
            let pivot_row = a.add(p * W);
            let pivot = *pivot_row.add(k);
            ok = L::and(ok, tiny.lt(pivot));
            let inv = L::splat(1.0) / pivot;
            *inverse_pivots.add(p) = inv;
            let yp = *y.add(p);
            for d in 1..=k {
                // Row p + d holds column p at k - d and columns p + 1 ..= p + k at k - d + 1 ..= 2 k - d.
                let row = a.add((p + d) * W);
                let l = *row.add(k - d) * inv;
                for e in 1..=k {
                    let target = row.add(k - d + e);
                    *target = (-l).madd(*pivot_row.add(k + e), *target);
                }
                let yd = y.add(p + d);
                *yd = (-l).madd(yp, *yd);
            }
        }
        for p in (0..n).rev() {
            let row = a.add(p * W);
            let mut sum = *y.add(p);
            for e in 1..=k {
                sum = (-*row.add(k + e)).madd(*y.add(p + e), sum);
            }
            *y.add(p) = sum * *inverse_pivots.add(p);
        }
    }
    L::all(ok)
}

/// Solve the dense n x n system `a x = r` in place (x ends in `r`) by Gaussian elimination with partial
/// pivoting (any nonsingular matrix). A zero pivot is replaced by 1e-300 so the result stays defined.
pub fn dense_solve(a: &mut [f64], r: &mut [f64], n: usize) {
    for col in 0..n {
        let mut pivot = col;
        let mut largest = a[col * n + col].abs();
        for row in col + 1..n {
            let m = a[row * n + col].abs();
            if m > largest {
                pivot = row;
                largest = m;
            }
        }
        if pivot != col {
            for j in 0..n {
                a.swap(col * n + j, pivot * n + j);
            }
            r.swap(col, pivot);
        }
        let d = a[col * n + col];
        let d = if d.abs() < 1e-300 { 1e-300 } else { d };
        a[col * n + col] = d;
        let inv = 1.0 / d;
        for row in col + 1..n {
            let f = a[row * n + col] * inv;
            if f != 0.0 {
                for k in col + 1..n {
                    a[row * n + k] -= f * a[col * n + k];
                }
                r[row] -= f * r[col];
            }
        }
    }
    for col in (0..n).rev() {
        let mut sum = r[col];
        for k in col + 1..n {
            sum -= a[col * n + k] * r[k];
        }
        r[col] = sum / a[col * n + col];
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Elimination in the band gives the solution that dense Gaussian elimination with partial pivoting gives
    /// (a general method), on a banded, diagonally dominant but unsymmetric matrix with a ragged profile.
    #[test]
    fn band_solve_matches_dense_pivoting() {
        let n = 9;
        let entries: Vec<(usize, usize)> = vec![
            (0, 1),
            (1, 0),
            (2, 0),
            (1, 2),
            (2, 1),
            (3, 2),
            (2, 3),
            (4, 3),
            (3, 5),
            (5, 3),
            (5, 4),
            (6, 5),
            (5, 6),
            (7, 6),
            (8, 6),
            (6, 8),
        ];
        let shape = BandShape::new(n, entries.iter().copied()).unwrap();
        assert_eq!(shape.half, 2);
        let mut band = vec![0.0f64; shape.rows() * shape.width()];
        for i in n..shape.rows() {
            band[i * shape.width() + shape.half] = 1.0;
        }
        let mut dense = vec![0.0f64; n * n];
        let mut seed = 12345u64;
        let mut random = || {
            seed = seed
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            ((seed >> 11) as f64 / (1u64 << 53) as f64) - 0.5
        };
        for &(i, j) in &entries {
            let v = random();
            band[shape.at(i, j)] = v;
            dense[i * n + j] = v;
        }
        for i in 0..n {
            let v = 3.0 + random();
            band[shape.at(i, i)] = v;
            dense[i * n + i] = v;
        }
        let rhs: Vec<f64> = (0..n).map(|_| random()).collect();
        let mut y = rhs.clone();
        y.resize(shape.rows(), 0.0);
        let mut r = rhs.clone();
        let mut inv = vec![0.0; n];
        assert!(solve::<5, f64>(n, &mut band, &mut y, &mut inv));
        dense_solve(&mut dense, &mut r, n);
        for k in 0..n {
            assert!(
                (y[k] - r[k]).abs() < 1e-12,
                "x{k}: band {} dense {}",
                y[k],
                r[k]
            );
        }
    }
}
