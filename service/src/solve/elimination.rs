//! Sparse LU factorisation of `A = I - Q` by Gaussian elimination with diagonal pivots in
//! Markowitz order (a greedy fill-reducing ordering), written once for exact rationals and doubles.
//!
//! Diagonal pivots need no row exchanges here: `I - Q` over the transient states is a nonsingular
//! M-matrix, so every pivot met along the way is positive (its leading principal minors are), and
//! for doubles the elimination is stable without pivoting. Only the factors are kept; solutions are
//! computed per right-hand side, so nothing asks for the full inverse.

use std::cmp::Reverse;
use std::collections::BinaryHeap;

use super::budget::Budget;
use super::scalar::Scalar;
use super::SolveError;

/// A sparse row: `(column, value)` sorted by column.
pub type SparseRow<S> = Vec<(usize, S)>;

/// The LU factors of a square sparse matrix.
#[derive(Debug)]
pub struct Factors<S> {
    /// Pivots in elimination order.
    order: Vec<usize>,
    /// `lower[p]`: multipliers `(row, l)` applied when pivot `p` was eliminated.
    lower: Vec<SparseRow<S>>,
    /// `upper[p]`: row `p` when it became the pivot row, diagonal included.
    upper: Vec<SparseRow<S>>,
    /// `upper[p]`'s diagonal entry.
    pivot: Vec<S>,
}

impl<S: Scalar> Factors<S> {
    /// Factors the `n x n` matrix given by its rows (each sorted by column, diagonal present).
    ///
    /// # Errors
    /// [`SolveError::BudgetExceeded`] past the deadline; [`SolveError::Numerical`] if a pivot is
    /// zero, which a valid chain cannot produce in exact arithmetic.
    pub fn new(mut rows: Vec<SparseRow<S>>, budget: &Budget) -> Result<Self, SolveError> {
        let n = rows.len();
        // Rows holding a (possibly since eliminated) entry in each column.
        let mut column_rows: Vec<Vec<usize>> = vec![Vec::new(); n];
        let mut column_count = vec![0usize; n];
        for (i, row) in rows.iter().enumerate() {
            for &(j, _) in row {
                column_rows[j].push(i);
                column_count[j] += 1;
            }
        }
        let markowitz = |rows: &[SparseRow<S>], counts: &[usize], i: usize| {
            rows[i].len().saturating_sub(1) * counts[i].saturating_sub(1)
        };
        let mut queue: BinaryHeap<Reverse<(usize, usize)>> = (0..n)
            .map(|i| Reverse((markowitz(&rows, &column_count, i), i)))
            .collect();
        let mut eliminated = vec![false; n];
        let mut order = Vec::with_capacity(n);
        let mut lower: Vec<SparseRow<S>> = vec![Vec::new(); n];
        let mut upper: Vec<SparseRow<S>> = vec![Vec::new(); n];
        let mut pivot = vec![S::zero(); n];

        while let Some(Reverse((cost, p))) = queue.pop() {
            if eliminated[p] {
                continue;
            }
            let current = markowitz(&rows, &column_count, p);
            if current != cost {
                queue.push(Reverse((current, p)));
                continue;
            }
            budget.check()?;
            let pivot_row = std::mem::take(&mut rows[p]);
            let diagonal =
                match pivot_row.binary_search_by_key(&p, |&(j, _)| j) {
                    Ok(at) if !pivot_row[at].1.is_zero() => pivot_row[at].1.clone(),
                    _ => return Err(SolveError::Numerical(
                        "a pivot of the elimination is zero (probabilities too small for doubles)"
                            .into(),
                    )),
                };
            for &(j, _) in &pivot_row {
                column_count[j] -= 1;
            }
            eliminated[p] = true;
            let candidates = std::mem::take(&mut column_rows[p]);
            for i in candidates {
                if eliminated[i] {
                    continue;
                }
                let Ok(at) = rows[i].binary_search_by_key(&p, |&(j, _)| j) else {
                    continue;
                };
                if S::EXACT {
                    budget.check()?;
                }
                let (_, entry) = rows[i].remove(at);
                let multiplier = entry.div(&diagonal);
                rows[i] = subtract_scaled(
                    std::mem::take(&mut rows[i]),
                    &pivot_row,
                    p,
                    &multiplier,
                    |j| {
                        column_rows[j].push(i);
                        column_count[j] += 1;
                    },
                );
                lower[p].push((i, multiplier));
                queue.push(Reverse((markowitz(&rows, &column_count, i), i)));
            }
            for &(j, _) in &pivot_row {
                if !eliminated[j] {
                    queue.push(Reverse((markowitz(&rows, &column_count, j), j)));
                }
            }
            pivot[p] = diagonal;
            upper[p] = pivot_row;
            order.push(p);
        }
        Ok(Factors {
            order,
            lower,
            upper,
            pivot,
        })
    }

    /// Number of stored entries in both factors (a measure of fill).
    #[must_use]
    pub fn entries(&self) -> usize {
        self.lower.iter().map(Vec::len).sum::<usize>()
            + self.upper.iter().map(Vec::len).sum::<usize>()
    }

    /// Solves `A x = b`.
    ///
    /// # Errors
    /// [`SolveError::BudgetExceeded`] past the deadline.
    pub fn solve(&self, mut b: Vec<S>, budget: &Budget) -> Result<Vec<S>, SolveError> {
        budget.check()?;
        for &p in &self.order {
            if b[p].is_zero() {
                continue;
            }
            let bp = b[p].clone();
            for (i, l) in &self.lower[p] {
                b[*i] = b[*i].sub(&l.mul(&bp));
            }
        }
        budget.check()?;
        for &p in self.order.iter().rev() {
            let mut sum = b[p].clone();
            for (j, u) in &self.upper[p] {
                if *j != p && !b[*j].is_zero() {
                    sum = sum.sub(&u.mul(&b[*j]));
                }
            }
            b[p] = sum.div(&self.pivot[p]);
        }
        Ok(b)
    }

    /// Solves `Aᵀ x = c` (rows of the inverse, e.g. expected visits from a start distribution).
    ///
    /// # Errors
    /// [`SolveError::BudgetExceeded`] past the deadline.
    pub fn solve_transposed(&self, mut c: Vec<S>, budget: &Budget) -> Result<Vec<S>, SolveError> {
        budget.check()?;
        // Uᵀ z = c, in elimination order.
        for &p in &self.order {
            let zp = c[p].div(&self.pivot[p]);
            if !zp.is_zero() {
                for (j, u) in &self.upper[p] {
                    if *j != p {
                        c[*j] = c[*j].sub(&u.mul(&zp));
                    }
                }
            }
            c[p] = zp;
        }
        budget.check()?;
        // Lᵀ x = z, in reverse order.
        for &p in self.order.iter().rev() {
            let mut sum = c[p].clone();
            for (i, l) in &self.lower[p] {
                if !c[*i].is_zero() {
                    sum = sum.sub(&l.mul(&c[*i]));
                }
            }
            c[p] = sum;
        }
        Ok(c)
    }
}

/// `row - multiplier * pivot_row`, skipping the pivot's own column; calls `on_fill(j)` for every
/// column that was empty in `row`.
fn subtract_scaled<S: Scalar>(
    row: SparseRow<S>,
    pivot_row: &[(usize, S)],
    pivot: usize,
    multiplier: &S,
    mut on_fill: impl FnMut(usize),
) -> SparseRow<S> {
    let mut merged = Vec::with_capacity(row.len() + pivot_row.len());
    let mut left = row.into_iter().peekable();
    let mut right = pivot_row.iter().filter(|(j, _)| *j != pivot).peekable();
    loop {
        match (left.peek(), right.peek()) {
            (Some((a, _)), Some((b, _))) if a < b => merged.push(left.next().unwrap()),
            (Some((a, _)), Some((b, _))) if a == b => {
                let (j, value) = left.next().unwrap();
                let (_, u) = right.next().unwrap();
                merged.push((j, value.sub(&multiplier.mul(u))));
            }
            (_, Some(_)) => {
                let (j, u) = right.next().unwrap();
                on_fill(*j);
                merged.push((*j, S::zero().sub(&multiplier.mul(u))));
            }
            (Some(_), None) => merged.push(left.next().unwrap()),
            (None, None) => break,
        }
    }
    merged
}

#[cfg(test)]
mod tests {
    use super::*;
    use num_rational::BigRational;
    use std::time::Duration;

    /// `A x` for a sparse matrix given by rows (residuals now live in the float engine).
    fn multiply<S: Scalar>(rows: &[SparseRow<S>], x: &[S]) -> Vec<S> {
        rows.iter()
            .map(|row| {
                row.iter()
                    .fold(S::zero(), |sum, (j, a)| sum.add(&a.mul(&x[*j])))
            })
            .collect()
    }

    fn r(n: i64, d: i64) -> BigRational {
        BigRational::new(n.into(), d.into())
    }

    #[test]
    fn solves_and_transposed_solves_a_small_system_exactly() {
        // A = [[1, -1/2, 0], [-1/3, 1, -1/3], [0, -1/4, 1]]
        let rows = vec![
            vec![(0, r(1, 1)), (1, r(-1, 2))],
            vec![(0, r(-1, 3)), (1, r(1, 1)), (2, r(-1, 3))],
            vec![(1, r(-1, 4)), (2, r(1, 1))],
        ];
        let budget = Budget::new(Duration::from_secs(5));
        let factors = Factors::new(rows.clone(), &budget).unwrap();
        let b = vec![r(1, 1), r(2, 1), r(3, 1)];
        let x = factors.solve(b.clone(), &budget).unwrap();
        assert_eq!(multiply(&rows, &x), b);
        let y = factors.solve_transposed(b.clone(), &budget).unwrap();
        let transposed: Vec<SparseRow<BigRational>> = (0..3)
            .map(|j| {
                (0..3)
                    .filter_map(|i| {
                        rows[i]
                            .iter()
                            .find(|(c, _)| *c == j)
                            .map(|(_, v)| (i, v.clone()))
                    })
                    .collect()
            })
            .collect();
        assert_eq!(multiply(&transposed, &y), b);
    }
}
