//! A sparse direct solver in doubles for `A x = b` and `Aᵀ y = c`, where `A = I - Q` is taken over
//! the transient states of an absorbing chain.
//!
//! Such an `A` is a nonsingular M-matrix: positive diagonal, non-positive off-diagonal entries and
//! weakly diagonally dominant rows. Gaussian elimination with the diagonal pivots taken in any
//! symmetric order then needs no row exchanges: every Schur complement is again a nonsingular
//! M-matrix, the factors have the sign pattern of one, and the process is backward stable. The
//! order can therefore be chosen for sparsity alone, which happens in three steps:
//!
//! 1. [`analyse`] orders the pattern of `A + Aᵀ` by approximate minimum degree, then counts the
//!    fill of that symmetric pattern exactly (elimination tree and column counts of its Cholesky
//!    factor). The unsymmetric factors of `A` fit inside that pattern, so the count is an upper
//!    bound that a caller can compare with its budget before any numeric work starts.
//! 2. [`DirectFactors::new`] computes `P A Pᵀ = L U` one column at a time, left-looking: each
//!    column is a sparse triangular solve with the finished columns of `L`, whose nonzero pattern
//!    comes from a depth-first search over the graph of `L`. The search keeps its own stack, so a
//!    long chain cannot overflow the thread's stack, and the work is proportional to the
//!    floating-point operations plus the entries. When the analysis finds a trailing block of
//!    the order at least half full (as happens when the fill is heavy), that block's Schur
//!    complement is formed by the same sparse solves and then factored as a dense matrix, in
//!    cache-sized tiles, an order of magnitude faster than sparse columns.
//! 3. [`DirectFactors::solve_in_place`] and [`DirectFactors::solve_transposed_in_place`] are two
//!    sweeps over the stored factors.

use std::fmt;

use super::sparse::Csr;

/// Marks "no node" in parent, ancestor and stamp arrays.
const NONE: usize = usize::MAX;

/// Columns between two looks at the interruption flag, however cheap they are.
const CHECK_COLUMNS: usize = 4096;

/// Multiply-adds (and visited entries) between two looks at the interruption flag, so that a
/// stretch of expensive columns is interruptible too.
const CHECK_WORK: usize = 1 << 22;

/// Largest number of entries reserved up front for each factor; the prediction is an upper
/// bound that may be loose for very unsymmetric patterns, so anything beyond grows on demand.
const RESERVE_CAP: usize = 1 << 26;

/// Smallest trailing block worth factoring as a dense matrix: below it the sparse columns are
/// as fast, and the dense copy would only cost memory.
const MIN_DENSE: usize = 64;

/// Columns of one panel of the blocked dense factorization.
const PANEL: usize = 64;

/// Rows and columns of the register tile of the dense update.
const TILE_ROWS: usize = 4;
const TILE_COLUMNS: usize = 4;

/// Rows of the packed panel kept in cache while it updates every column of the trailing block.
const CHUNK_ROWS: usize = 256;

/// A cheap upper estimate of the entries of `L + U`, in time linear in the entries of `a`, for
/// deciding whether [`analyse`] is worth running: the ordering's own cost grows with the fill it
/// finds, which on expander-like chains is minutes for a million states.
///
/// States of very high degree (hubs such as a reset state, or the first states of a pattern
/// automaton) are set aside: a minimum-degree order eliminates them last, adding at most a row
/// and a column each. The rest is ordered by breadth-first levels from a far-away state (one
/// sweep to find it, one to measure); in such an order the fill stays between consecutive
/// levels, so `Σ w_k (w_k + w_{k+1})` over the level widths bounds it.
#[must_use]
pub fn level_fill_bound(a: &Csr) -> f64 {
    let n = a.n;
    let transposed = a.transpose();
    let hub_degree = 16.0_f64.max(10.0 * (n as f64).sqrt());
    let degree = |i: usize| {
        (a.row_start[i + 1] - a.row_start[i])
            + (transposed.row_start[i + 1] - transposed.row_start[i])
    };
    let hub: Vec<bool> = (0..n).map(|i| degree(i) as f64 > hub_degree).collect();
    let hubs = hub.iter().filter(|&&h| h).count();
    let neighbours = |i: usize| {
        a.column[a.row_start[i]..a.row_start[i + 1]]
            .iter()
            .chain(&transposed.column[transposed.row_start[i]..transposed.row_start[i + 1]])
            .copied()
    };
    // Breadth-first levels from `root` over unvisited non-hub states, stamping them `mark`;
    // returns the widths and the last state reached.
    let mut stamp = vec![NONE; n];
    let mut queue = Vec::with_capacity(n);
    let mut levels = |root: usize, mark: usize, stamp: &mut Vec<usize>| {
        queue.clear();
        queue.push(root);
        stamp[root] = mark;
        let mut widths = Vec::new();
        let mut begin = 0;
        while begin < queue.len() {
            let end = queue.len();
            widths.push((end - begin) as f64);
            for k in begin..end {
                for j in neighbours(queue[k]) {
                    if !hub[j] && stamp[j] != mark {
                        stamp[j] = mark;
                        queue.push(j);
                    }
                }
            }
            begin = end;
        }
        (widths, *queue.last().expect("the root is queued"))
    };
    let mut bound = n as f64 + 2.0 * hubs as f64 * n as f64;
    let mut marks = 0;
    for root in 0..n {
        if hub[root] || stamp[root] != NONE {
            continue;
        }
        let (_, far) = levels(root, marks, &mut stamp);
        let (widths, _) = levels(far, marks + 1, &mut stamp);
        marks += 2;
        for (k, w) in widths.iter().enumerate() {
            bound += w * (w + widths.get(k + 1).copied().unwrap_or(0.0));
        }
    }
    bound
}

/// What [`analyse`] decided about a matrix before any numeric work.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Analysis {
    /// The elimination order: `order[k]` is the original index pivoted `k`-th.
    pub order: Vec<usize>,
    /// Predicted entries of `L + U`, the diagonal counted once. Exact for a matrix whose pattern
    /// is symmetric, an upper bound otherwise (barring exact cancellation, which only lowers it).
    pub predicted_entries: usize,
    /// Position (in the elimination order) from which the remaining columns are factored as one
    /// dense block; `n` when no trailing block is dense enough.
    dense_from: usize,
}

/// Orders `a` for sparse elimination and predicts the size of its factors.
///
/// Memory is linear in the entries of `a`, and so is the time of everything but the ordering.
/// The ordering is fast when the fill is moderate, but its time grows with the fill it finds:
/// on patterns without small separators (states jumping to uniformly random states) it takes
/// roughly a nanosecond per predicted entry, which is minutes for a million such states.
#[must_use]
pub fn analyse(a: &Csr) -> Analysis {
    let n = a.n;
    if n == 0 {
        return Analysis {
            order: Vec::new(),
            predicted_entries: 0,
            dense_from: 0,
        };
    }
    let order = minimum_degree_order(a);
    let position = inverse(&order);
    let graph = Graph::symmetric(a, &position);
    let parent = elimination_tree(&graph);
    let post = postorder(&parent);
    let counts = column_counts(&graph, &parent, &post);
    let lower: usize = counts.iter().sum();
    Analysis {
        order,
        // `lower` counts the Cholesky factor of the symmetric pattern with its diagonal; L and
        // U each fit in its strictly lower part (U transposed), and share the diagonal.
        predicted_entries: 2 * lower - n,
        dense_from: dense_start(&counts, MIN_DENSE),
    }
}

/// Start of the trailing block whose every column is at least half full in the symmetric
/// pattern, or `n` when that block has fewer than `min_size` columns. Such a block costs at
/// most twice its predicted entries when stored densely, and runs far faster that way.
fn dense_start(counts: &[usize], min_size: usize) -> usize {
    let n = counts.len();
    let mut start = n;
    // `counts[k]` includes the diagonal and is at most `n - k`.
    while start > 0 && 2 * counts[start - 1] > n - start {
        start -= 1;
    }
    if n - start >= min_size {
        start
    } else {
        n
    }
}

/// Approximate minimum degree order of the pattern of `A + Aᵀ`.
fn minimum_degree_order(a: &Csr) -> Vec<usize> {
    // The ordering routine reads compressed columns; the rows of `A` are the columns of `Aᵀ`,
    // and `Aᵀ + A` has the same pattern as `A + Aᵀ`.
    let control = amd::Control::default();
    match amd::order(a.n, &a.row_start, &a.column, &control) {
        Ok((order, _, _)) if is_permutation(&order) => order,
        // Only a malformed pattern gets here; the natural order is still correct, just slower.
        _ => (0..a.n).collect(),
    }
}

fn is_permutation(order: &[usize]) -> bool {
    let mut seen = vec![false; order.len()];
    order
        .iter()
        .all(|&i| i < seen.len() && !std::mem::replace(&mut seen[i], true))
}

/// `position[order[k]] = k`.
fn inverse(order: &[usize]) -> Vec<usize> {
    let mut position = vec![0; order.len()];
    for (k, &i) in order.iter().enumerate() {
        position[i] = k;
    }
    position
}

/// The off-diagonal pattern of `P (A + Aᵀ) Pᵀ` as adjacency lists, in the new numbering.
/// Repeated neighbours are allowed: every routine below is indifferent to them.
struct Graph {
    start: Vec<usize>,
    adjacent: Vec<usize>,
}

impl Graph {
    fn symmetric(a: &Csr, position: &[usize]) -> Graph {
        let n = a.n;
        let mut start = vec![0usize; n + 1];
        for i in 0..n {
            for &j in &a.column[a.row_start[i]..a.row_start[i + 1]] {
                if j != i {
                    start[position[i] + 1] += 1;
                    start[position[j] + 1] += 1;
                }
            }
        }
        for v in 0..n {
            start[v + 1] += start[v];
        }
        let mut next = start[..n].to_vec();
        let mut adjacent = vec![0; start[n]];
        for i in 0..n {
            let pi = position[i];
            for &j in &a.column[a.row_start[i]..a.row_start[i + 1]] {
                if j != i {
                    let pj = position[j];
                    adjacent[next[pi]] = pj;
                    next[pi] += 1;
                    adjacent[next[pj]] = pi;
                    next[pj] += 1;
                }
            }
        }
        Graph { start, adjacent }
    }

    fn len(&self) -> usize {
        self.start.len() - 1
    }

    fn neighbours(&self, v: usize) -> &[usize] {
        &self.adjacent[self.start[v]..self.start[v + 1]]
    }
}

/// Parent of each node in the elimination tree of the symmetric pattern (`NONE` for roots).
///
/// The parent of `i` is the first `k > i` whose row of the Cholesky factor has an entry in
/// column `i`; compressed paths to the current root find it in nearly linear time.
fn elimination_tree(graph: &Graph) -> Vec<usize> {
    let n = graph.len();
    let mut parent = vec![NONE; n];
    let mut ancestor = vec![NONE; n];
    for k in 0..n {
        for &start in graph.neighbours(k) {
            // `NONE` is larger than any `k`, so this also stops at a root.
            let mut i = start;
            while i < k {
                let next = ancestor[i];
                ancestor[i] = k;
                if next == NONE {
                    parent[i] = k;
                }
                i = next;
            }
        }
    }
    parent
}

/// The nodes of the forest in postorder (children before parents), without recursion.
fn postorder(parent: &[usize]) -> Vec<usize> {
    let n = parent.len();
    let mut first_child = vec![NONE; n];
    let mut next_sibling = vec![NONE; n];
    for j in (0..n).rev() {
        let p = parent[j];
        if p != NONE {
            next_sibling[j] = first_child[p];
            first_child[p] = j;
        }
    }
    let mut post = Vec::with_capacity(n);
    let mut stack = Vec::new();
    for root in (0..n).filter(|&j| parent[j] == NONE) {
        stack.push(root);
        while let Some(&v) = stack.last() {
            let child = first_child[v];
            if child == NONE {
                stack.pop();
                post.push(v);
            } else {
                first_child[v] = next_sibling[child];
                stack.push(child);
            }
        }
    }
    post
}

/// Entries of each column of the Cholesky factor of the symmetric pattern, diagonal included.
///
/// Row `i` of the factor is the subtree of the elimination tree spanned by the neighbours
/// `j < i` of `i` and rooted at `i`. Every column count is then the number of row subtrees
/// holding that column, found in nearly linear time by adding one at each leaf of a row subtree
/// and removing one at the least common ancestor of consecutive leaves (in postorder), then
/// summing over the tree.
fn column_counts(graph: &Graph, parent: &[usize], post: &[usize]) -> Vec<usize> {
    let n = parent.len();
    // `first[v]` is one plus the postorder index of the first descendant of `v` (0: not set).
    let mut first = vec![0usize; n];
    let mut delta = vec![0isize; n];
    for (k, &j) in post.iter().enumerate() {
        // A node still without a first descendant when reached in postorder is a leaf.
        delta[j] = isize::from(first[j] == 0);
        let mut v = j;
        while v != NONE && first[v] == 0 {
            first[v] = k + 1;
            v = parent[v];
        }
    }
    let mut max_first = vec![0usize; n];
    let mut previous_leaf = vec![NONE; n];
    let mut ancestor: Vec<usize> = (0..n).collect();
    for &j in post {
        if parent[j] != NONE {
            delta[parent[j]] -= 1;
        }
        for &i in graph.neighbours(j) {
            // `j` is a leaf of row subtree `i` only if no earlier neighbour of `i` lies in the
            // subtree of `j`.
            if i <= j || first[j] <= max_first[i] {
                continue;
            }
            max_first[i] = first[j];
            let previous = std::mem::replace(&mut previous_leaf[i], j);
            delta[j] += 1;
            if previous != NONE {
                let mut q = previous;
                while q != ancestor[q] {
                    q = ancestor[q];
                }
                let mut s = previous;
                while s != q {
                    let up = ancestor[s];
                    ancestor[s] = q;
                    s = up;
                }
                // `q` is the least common ancestor of the two leaves: counted twice so far.
                delta[q] -= 1;
            }
        }
        if parent[j] != NONE {
            ancestor[j] = parent[j];
        }
    }
    // Parents are numbered after their children, so one forward sweep sums every subtree.
    for j in 0..n {
        if parent[j] != NONE {
            delta[parent[j]] += delta[j];
        }
    }
    delta
        .into_iter()
        .map(|d| usize::try_from(d).unwrap_or(0))
        .collect()
}

/// Why [`DirectFactors::new`] stopped.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum DirectError {
    /// The `interrupted` callback asked to stop.
    Interrupted,
    /// A pivot came out zero or not finite; `row` is the original index of its row. This cannot
    /// happen for a nonsingular M-matrix short of overflow, so the matrix is singular (a closed
    /// class among the states) or not of that kind.
    ZeroPivot {
        /// Original index of the row (and column) whose pivot failed.
        row: usize,
    },
}

impl fmt::Display for DirectError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            DirectError::Interrupted => write!(f, "the factorization was interrupted"),
            DirectError::ZeroPivot { row } => {
                write!(f, "zero or non-finite pivot at row {row}")
            }
        }
    }
}

impl std::error::Error for DirectError {}

/// The factors `P A Pᵀ = L D U`, with `P` the permutation of an [`Analysis`].
///
/// `L` is unit lower triangular, `D` diagonal (the pivots) and `U` unit upper triangular; `L` and
/// `U` are stored by columns without their diagonals. Indices are in the new numbering, rows as
/// `u32` to halve the index traffic of the solves. Keeping `D` apart lets the solves divide off
/// the chain of dependent updates, where a division's latency would dominate a sparse sweep.
#[derive(Clone)]
pub struct DirectFactors {
    order: Vec<usize>,
    l_start: Vec<usize>,
    l_row: Vec<u32>,
    l_value: Vec<f64>,
    u_start: Vec<usize>,
    u_row: Vec<u32>,
    u_value: Vec<f64>,
    diagonal: Vec<f64>,
}

impl fmt::Debug for DirectFactors {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("DirectFactors")
            .field("n", &self.order.len())
            .field("entries", &self.entries())
            .finish_non_exhaustive()
    }
}

impl DirectFactors {
    /// Factors `a` in the order of `analysis` (which must come from [`analyse`] on a matrix of
    /// the same pattern).
    ///
    /// The factors take at most `analysis.predicted_entries` entries of 12 bytes (plus 16 bytes
    /// a row); while a dense trailing block is factored, up to twice its predicted entries in
    /// 8-byte numbers are held on top.
    ///
    /// `interrupted` is called every few thousand columns, and after every few million
    /// multiply-adds; once it returns `true` the work stops with [`DirectError::Interrupted`].
    ///
    /// # Errors
    /// [`DirectError::Interrupted`] as above; [`DirectError::ZeroPivot`] when a pivot is zero or
    /// not finite.
    ///
    /// # Panics
    /// If the order of `analysis` is not a permutation of `0..a.n`, or `a.n` exceeds
    /// `u32::MAX`.
    pub fn new(
        a: &Csr,
        analysis: &Analysis,
        interrupted: &dyn Fn() -> bool,
    ) -> Result<Self, DirectError> {
        assert!(
            analysis.order.len() == a.n && is_permutation(&analysis.order),
            "analysis of another matrix"
        );
        factor(
            a,
            &analysis.order,
            analysis.predicted_entries,
            analysis.dense_from.min(a.n),
            interrupted,
        )
    }

    /// Stored entries of `L + U`, the diagonal counted once.
    #[must_use]
    pub fn entries(&self) -> usize {
        self.l_row.len() + self.u_row.len() + self.diagonal.len()
    }

    /// Overwrites `b` with the solution `x` of `A x = b`.
    ///
    /// # Panics
    /// If `b` does not have one entry per row.
    pub fn solve_in_place(&self, b: &mut [f64]) {
        let n = self.order.len();
        assert_eq!(b.len(), n, "right-hand side of the wrong length");
        // A x = b  ⇔  L D U (P x) = P b.
        let mut y: Vec<f64> = self.order.iter().map(|&i| b[i]).collect();
        for j in 0..n {
            let yj = y[j];
            if yj != 0.0 {
                let range = self.l_start[j]..self.l_start[j + 1];
                for (&r, &l) in self.l_row[range.clone()].iter().zip(&self.l_value[range]) {
                    y[r as usize] -= l * yj;
                }
            }
            // Final after the updates above, which need the undivided value.
            y[j] = yj / self.diagonal[j];
        }
        for j in (0..n).rev() {
            let yj = y[j];
            if yj != 0.0 {
                let range = self.u_start[j]..self.u_start[j + 1];
                for (&r, &u) in self.u_row[range.clone()].iter().zip(&self.u_value[range]) {
                    y[r as usize] -= u * yj;
                }
            }
        }
        for (&i, &v) in self.order.iter().zip(&y) {
            b[i] = v;
        }
    }

    /// Overwrites `c` with the solution `y` of `Aᵀ y = c`.
    ///
    /// # Panics
    /// If `c` does not have one entry per row.
    pub fn solve_transposed_in_place(&self, c: &mut [f64]) {
        let n = self.order.len();
        assert_eq!(c.len(), n, "right-hand side of the wrong length");
        // Aᵀ y = c  ⇔  Uᵀ D Lᵀ (P y) = P c; a column of U or L is a row of its transpose, so
        // each sweep is a sequence of dot products.
        let mut y: Vec<f64> = self.order.iter().map(|&i| c[i]).collect();
        for j in 0..n {
            let range = self.u_start[j]..self.u_start[j + 1];
            let mut s = y[j];
            for (&r, &u) in self.u_row[range.clone()].iter().zip(&self.u_value[range]) {
                s -= u * y[r as usize];
            }
            y[j] = s;
        }
        for j in (0..n).rev() {
            let range = self.l_start[j]..self.l_start[j + 1];
            // `y[j]` is final from the first sweep, so this division waits on nothing.
            let mut s = y[j] / self.diagonal[j];
            for (&r, &l) in self.l_row[range.clone()].iter().zip(&self.l_value[range]) {
                s -= l * y[r as usize];
            }
            y[j] = s;
        }
        for (&i, &v) in self.order.iter().zip(&y) {
            c[i] = v;
        }
    }
}

/// The factorization behind [`DirectFactors::new`]: sparse left-looking columns up to
/// `dense_from`, then one dense block for the rest.
///
/// For a column `k` at or past `dense_from`, the same sparse triangular solve, run only with the
/// sparse columns of `L`, yields the rows of `U` above the block and one column of the Schur
/// complement that the dense block then factors.
fn factor(
    a: &Csr,
    order: &[usize],
    predicted_entries: usize,
    dense_from: usize,
    interrupted: &dyn Fn() -> bool,
) -> Result<DirectFactors, DirectError> {
    let n = a.n;
    assert!(u32::try_from(n).is_ok(), "too many rows for 32-bit indices");
    let order = order.to_vec();
    let position = inverse(&order);
    let (b_start, b_row, b_value) = permuted_columns(a, &position);
    let k0 = dense_from;
    let m = n - k0;

    let strict = predicted_entries.saturating_sub(n) / 2;
    let reserve = strict.min(RESERVE_CAP);
    let mut l_start = Vec::with_capacity(n + 1);
    let mut l_row: Vec<u32> = Vec::with_capacity(reserve);
    let mut l_value = Vec::with_capacity(reserve);
    let mut u_start = Vec::with_capacity(n + 1);
    let mut u_row: Vec<u32> = Vec::with_capacity(reserve);
    let mut u_value = Vec::with_capacity(reserve);
    let mut diagonal = Vec::with_capacity(n);
    l_start.push(0);
    u_start.push(0);
    // The dense block, by columns, and the rows above it of the columns of U that cross it
    // (kept apart until the block is done, as those columns end with rows inside the block).
    let mut dense = vec![0.0f64; m * m];
    let mut crossing_start = vec![0usize];
    let mut crossing_row: Vec<u32> = Vec::new();
    let mut crossing_value: Vec<f64> = Vec::new();

    // Column k is computed in `x`, dense but zero outside the current pattern. `mark[i] == k`
    // says that `i` is already in the pattern of column k, which saves clearing marks.
    let mut x = vec![0.0f64; n];
    let mut mark = vec![NONE; n];
    // Where the depth-first search resumes in column `j` of `L`.
    let mut resume = vec![0usize; n];
    let mut stack: Vec<usize> = Vec::new();
    // Pattern of column k above the diagonal (and above the dense block), in postorder of the
    // search (its reverse is a topological order for the triangular solve), and the rest.
    let mut reach: Vec<usize> = Vec::new();
    let mut below: Vec<usize> = Vec::new();
    let mut work = 0usize;

    for k in 0..n {
        if k % CHECK_COLUMNS == 0 || work >= CHECK_WORK {
            work = 0;
            if interrupted() {
                return Err(DirectError::Interrupted);
            }
        }
        // Only finished sparse columns of L are searched; rows from `limit` on are leaves.
        let limit = k.min(k0);

        // Pattern: rows of column k of P A Pᵀ, plus everything reachable from those above
        // `limit` through the graph of the finished columns of L.
        mark[k] = k;
        for p in b_start[k]..b_start[k + 1] {
            let i = b_row[p];
            // `+=` so that repeated entries add up, as they would in a product.
            x[i] += b_value[p];
            if mark[i] == k {
                continue;
            }
            mark[i] = k;
            if i >= limit {
                below.push(i);
                continue;
            }
            stack.push(i);
            resume[i] = l_start[i];
            while let Some(&j) = stack.last() {
                let end = l_start[j + 1];
                let mut p = resume[j];
                let mut descended = false;
                while p < end {
                    let r = l_row[p] as usize;
                    p += 1;
                    if mark[r] != k {
                        mark[r] = k;
                        if r < limit {
                            resume[j] = p;
                            resume[r] = l_start[r];
                            stack.push(r);
                            descended = true;
                            break;
                        }
                        below.push(r);
                    }
                }
                if !descended {
                    stack.pop();
                    reach.push(j);
                }
            }
        }

        // Values: solve with the unit lower triangle in topological order.
        for &j in reach.iter().rev() {
            let xj = x[j];
            let range = l_start[j]..l_start[j + 1];
            work += range.len();
            if xj != 0.0 {
                for (&r, &l) in l_row[range.clone()].iter().zip(&l_value[range]) {
                    x[r as usize] -= l * xj;
                }
            }
        }
        work += reach.len() + below.len() + 1;

        // Rows above the diagonal (or the block) belong to U, divided by their pivots so that
        // U is unit triangular. Exact zeros (cancellation or stored zeros) are dropped: they
        // carry no dependence, so later searches stay correct and cheaper. Indices fit in `u32`
        // (checked above).
        let (rows, values, starts) = if k < k0 {
            (&mut u_row, &mut u_value, &mut u_start)
        } else {
            (&mut crossing_row, &mut crossing_value, &mut crossing_start)
        };
        for &j in &reach {
            let v = std::mem::replace(&mut x[j], 0.0);
            if v != 0.0 {
                rows.push(j as u32);
                values.push(v / diagonal[j]);
            }
        }
        starts.push(rows.len());

        if k < k0 {
            let pivot = std::mem::replace(&mut x[k], 0.0);
            if pivot == 0.0 || !pivot.is_finite() {
                return Err(DirectError::ZeroPivot { row: order[k] });
            }
            diagonal.push(pivot);
            for &i in &below {
                let v = std::mem::replace(&mut x[i], 0.0);
                if v != 0.0 {
                    l_row.push(i as u32);
                    l_value.push(v / pivot);
                }
            }
            l_start.push(l_row.len());
        } else {
            // A column of the Schur complement, into the dense block.
            let column = &mut dense[(k - k0) * m..(k - k0 + 1) * m];
            column[k - k0] = std::mem::replace(&mut x[k], 0.0);
            for &i in &below {
                column[i - k0] = std::mem::replace(&mut x[i], 0.0);
            }
        }
        reach.clear();
        below.clear();
    }
    drop((x, mark, resume, b_start, b_row, b_value));

    if m > 0 {
        dense_lu(&mut dense, m, interrupted).map_err(|stop| match stop {
            DenseStop::Interrupted => DirectError::Interrupted,
            DenseStop::ZeroPivot(i) => DirectError::ZeroPivot { row: order[k0 + i] },
        })?;
        diagonal.extend((0..m).map(|i| dense[i * (m + 1)]));
        for (c, column) in dense.chunks_exact(m).enumerate() {
            let k = k0 + c;
            for (r, &v) in column.iter().enumerate().skip(c + 1) {
                if v != 0.0 {
                    l_row.push((k0 + r) as u32);
                    l_value.push(v);
                }
            }
            l_start.push(l_row.len());
            let range = crossing_start[c]..crossing_start[c + 1];
            u_row.extend_from_slice(&crossing_row[range.clone()]);
            u_value.extend_from_slice(&crossing_value[range]);
            for (r, &v) in column.iter().enumerate().take(c) {
                if v != 0.0 {
                    u_row.push((k0 + r) as u32);
                    u_value.push(v / diagonal[k0 + r]);
                }
            }
            u_start.push(u_row.len());
            debug_assert_eq!(u_start.len(), k + 2);
        }
    }

    Ok(DirectFactors {
        order,
        l_start,
        l_row,
        l_value,
        u_start,
        u_row,
        u_value,
        diagonal,
    })
}

/// Why [`dense_lu`] stopped.
enum DenseStop {
    Interrupted,
    /// Index of the failed pivot within the block.
    ZeroPivot(usize),
}

/// Overwrites the `m × m` block `s` (by columns) with its factors `L U` without pivoting: the
/// unit lower triangle of `L` below the diagonal, `U` on and above it.
///
/// Blocked by panels of columns: each panel is factored column by column, the rows of `U` to its
/// right follow by a triangular solve, and the trailing block takes the product of the two as
/// register tiles of packed copies, the only part that costs `m³`.
fn dense_lu(s: &mut [f64], m: usize, interrupted: &dyn Fn() -> bool) -> Result<(), DenseStop> {
    let mut packed_l = Vec::new();
    let mut packed_u = Vec::new();
    let mut work = 0usize;
    let mut kb = 0;
    while kb < m {
        let ke = (kb + PANEL).min(m);
        let width = ke - kb;
        if interrupted() {
            return Err(DenseStop::Interrupted);
        }

        // The panel, column by column, over all rows below its top.
        for k in kb..ke {
            let pivot = s[k + k * m];
            if pivot == 0.0 || !pivot.is_finite() {
                return Err(DenseStop::ZeroPivot(k));
            }
            let (left, right) = s.split_at_mut((k + 1) * m);
            let column = &mut left[k * m..];
            for v in &mut column[k + 1..] {
                *v /= pivot;
            }
            for target in right.chunks_exact_mut(m).take(ke - k - 1) {
                let u = target[k];
                if u != 0.0 {
                    for (t, &l) in target[k + 1..].iter_mut().zip(&column[k + 1..]) {
                        *t -= l * u;
                    }
                }
            }
        }
        if ke == m {
            break;
        }

        let (left, right) = s.split_at_mut(ke * m);
        // Rows of U to the right of the panel: solve with its unit lower triangle.
        for target in right.chunks_exact_mut(m) {
            for k in kb..ke {
                let u = target[k];
                if u != 0.0 {
                    let column = &left[k * m..(k + 1) * m];
                    for (t, &l) in target[k + 1..ke].iter_mut().zip(&column[k + 1..ke]) {
                        *t -= l * u;
                    }
                }
            }
        }

        // Pack the panel's L below it in strips of `TILE_ROWS` rows and the new rows of U in
        // strips of `TILE_COLUMNS` columns, both zero-padded, so the tiles read contiguously.
        let rest = m - ke;
        let strips = rest.div_ceil(TILE_ROWS);
        let groups = rest.div_ceil(TILE_COLUMNS);
        packed_l.clear();
        packed_l.resize(strips * width * TILE_ROWS, 0.0);
        for (p, column) in left.chunks_exact(m).skip(kb).enumerate() {
            for (r, &v) in column[ke..].iter().enumerate() {
                packed_l[((r / TILE_ROWS) * width + p) * TILE_ROWS + r % TILE_ROWS] = v;
            }
        }
        packed_u.clear();
        packed_u.resize(groups * width * TILE_COLUMNS, 0.0);
        for (c, column) in right.chunks_exact(m).enumerate() {
            for (p, &v) in column[kb..ke].iter().enumerate() {
                packed_u[((c / TILE_COLUMNS) * width + p) * TILE_COLUMNS + c % TILE_COLUMNS] = v;
            }
        }

        // Trailing update, a chunk of rows at a time so its packed strips stay in cache.
        let mut chunk = 0;
        while chunk < strips {
            let chunk_end = (chunk + CHUNK_ROWS / TILE_ROWS).min(strips);
            work += (chunk_end - chunk) * TILE_ROWS * rest * width;
            if work >= CHECK_WORK {
                work = 0;
                if interrupted() {
                    return Err(DenseStop::Interrupted);
                }
            }
            for group in 0..groups {
                let u = &packed_u[group * width * TILE_COLUMNS..(group + 1) * width * TILE_COLUMNS];
                for strip in chunk..chunk_end {
                    let l = &packed_l[strip * width * TILE_ROWS..(strip + 1) * width * TILE_ROWS];
                    let product = tile_product(l, u);
                    let top = ke + strip * TILE_ROWS;
                    let height = (m - top).min(TILE_ROWS);
                    for (j, sums) in product.iter().enumerate() {
                        let c = ke + group * TILE_COLUMNS + j;
                        if c >= m {
                            break;
                        }
                        let target = &mut right[(c - ke) * m + top..(c - ke) * m + top + height];
                        for (t, &v) in target.iter_mut().zip(sums) {
                            *t -= v;
                        }
                    }
                }
            }
            chunk = chunk_end;
        }
        kb = ke;
    }
    Ok(())
}

/// The product of a packed strip of `L` (`TILE_ROWS` values per step) and a packed strip of `U`
/// (`TILE_COLUMNS` per step), by columns; small enough to stay in registers.
#[inline(always)]
fn tile_product(l: &[f64], u: &[f64]) -> [[f64; TILE_ROWS]; TILE_COLUMNS] {
    let mut sums = [[0.0f64; TILE_ROWS]; TILE_COLUMNS];
    for (lp, up) in l.chunks_exact(TILE_ROWS).zip(u.chunks_exact(TILE_COLUMNS)) {
        for (column, &uj) in sums.iter_mut().zip(up) {
            for (sum, &li) in column.iter_mut().zip(lp) {
                *sum += li * uj;
            }
        }
    }
    sums
}

/// The columns of `P A Pᵀ` (rows in the new numbering, in no particular order within a column).
fn permuted_columns(a: &Csr, position: &[usize]) -> (Vec<usize>, Vec<usize>, Vec<f64>) {
    let n = a.n;
    let entries = a.row_start[n];
    let mut start = vec![0usize; n + 1];
    for &j in &a.column[..entries] {
        start[position[j] + 1] += 1;
    }
    for k in 0..n {
        start[k + 1] += start[k];
    }
    let mut next = start[..n].to_vec();
    let mut row = vec![0usize; entries];
    let mut value = vec![0.0f64; entries];
    for i in 0..n {
        let new_row = position[i];
        for p in a.row_start[i]..a.row_start[i + 1] {
            let slot = &mut next[position[a.column[p]]];
            row[*slot] = new_row;
            value[*slot] = a.value[p];
            *slot += 1;
        }
    }
    (start, row, value)
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::cell::Cell;

    /// Small xorshift generator, enough for reproducible test matrices.
    struct Rng(u64);

    impl Rng {
        fn next(&mut self) -> u64 {
            let mut x = self.0;
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            self.0 = x;
            x
        }

        fn below(&mut self, m: usize) -> usize {
            (self.next() % m as u64) as usize
        }

        fn unit(&mut self) -> f64 {
            (self.next() >> 11) as f64 / (1u64 << 53) as f64
        }
    }

    /// `I - Q` for a chain in which every state moves to `targets` random states (weights 1 to
    /// 4) and leaves with weight `exit`; `chained` adds a step `i -> i + 1`, which keeps the
    /// matrix nonsingular when some states have no exit of their own.
    fn chain(
        n: usize,
        targets: usize,
        rng: &mut Rng,
        exit: &dyn Fn(&mut Rng, usize) -> f64,
        chained: bool,
    ) -> Csr {
        let rows: Vec<Vec<(usize, f64)>> = (0..n)
            .map(|i| {
                let mut weights: Vec<(usize, f64)> = Vec::new();
                let mut add = |j: usize, w: f64| match weights.iter_mut().find(|e| e.0 == j) {
                    Some(e) => e.1 += w,
                    None => weights.push((j, w)),
                };
                for _ in 0..targets {
                    let j = rng.below(n);
                    let w = 1.0 + rng.below(4) as f64;
                    add(j, w);
                }
                if chained && i + 1 < n {
                    add(i + 1, 1.0);
                }
                let out = exit(rng, i);
                let total: f64 = weights.iter().map(|e| e.1).sum::<f64>() + out;
                let mut row: Vec<(usize, f64)> =
                    weights.iter().map(|&(j, w)| (j, -w / total)).collect();
                match row.iter_mut().find(|e| e.0 == i) {
                    Some(e) => e.1 += 1.0,
                    None => row.push((i, 1.0)),
                }
                row
            })
            .collect();
        Csr::from_rows(&rows)
    }

    fn random_vector(n: usize, rng: &mut Rng) -> Vec<f64> {
        (0..n).map(|_| rng.unit() * 2.0 - 1.0).collect()
    }

    fn norm(v: &[f64]) -> f64 {
        v.iter().fold(0.0, |m, x| m.max(x.abs()))
    }

    /// `‖A x - b‖ / (‖A‖ ‖x‖ + ‖b‖)` in the maximum norm.
    fn relative_residual(a: &Csr, x: &[f64], b: &[f64], transposed: bool) -> f64 {
        let ax = if transposed {
            a.transposed_times(x)
        } else {
            a.times(x)
        };
        let r: Vec<f64> = ax.iter().zip(b).map(|(p, q)| p - q).collect();
        let at = a.transpose();
        let m = if transposed { &at } else { a };
        let a_norm = (0..m.n)
            .map(|i| m.row(i).map(|(_, v)| v.abs()).sum::<f64>())
            .fold(0.0, f64::max);
        norm(&r) / (a_norm * norm(x) + norm(b))
    }

    /// Dense Gaussian elimination with partial pivoting, on a flat row-major array.
    fn dense_solve(a: &Csr, b: &[f64], transposed: bool) -> Vec<f64> {
        let n = a.n;
        let mut m = vec![0.0; n * n];
        for i in 0..n {
            for (j, v) in a.row(i) {
                let (r, c) = if transposed { (j, i) } else { (i, j) };
                m[r * n + c] += v;
            }
        }
        let mut x = b.to_vec();
        for k in 0..n {
            let p = (k..n)
                .max_by(|&r, &s| m[r * n + k].abs().total_cmp(&m[s * n + k].abs()))
                .unwrap();
            for c in 0..n {
                m.swap(k * n + c, p * n + c);
            }
            x.swap(k, p);
            for r in k + 1..n {
                let f = m[r * n + k] / m[k * n + k];
                for c in k..n {
                    m[r * n + c] -= f * m[k * n + c];
                }
                x[r] -= f * x[k];
            }
        }
        for k in (0..n).rev() {
            let s: f64 = (k + 1..n).map(|c| m[k * n + c] * x[c]).sum();
            x[k] = (x[k] - s) / m[k * n + k];
        }
        x
    }

    fn factor(a: &Csr) -> (Analysis, DirectFactors) {
        let analysis = analyse(a);
        let factors = DirectFactors::new(a, &analysis, &|| false).expect("factors");
        (analysis, factors)
    }

    /// Fill of the symmetric pattern by plain elimination on a flat boolean matrix.
    fn dense_symbolic_entries(a: &Csr, order: &[usize]) -> usize {
        let n = a.n;
        let position = inverse(order);
        let mut s = vec![false; n * n];
        for i in 0..n {
            for (j, _) in a.row(i) {
                let (pi, pj) = (position[i], position[j]);
                s[pi * n + pj] = true;
                s[pj * n + pi] = true;
            }
        }
        for k in 0..n {
            for i in k + 1..n {
                if s[i * n + k] {
                    for j in k + 1..n {
                        if s[k * n + j] {
                            s[i * n + j] = true;
                        }
                    }
                }
            }
        }
        s.iter().filter(|&&e| e).count()
    }

    #[test]
    fn matches_dense_elimination_on_random_m_matrices() {
        let mut rng = Rng(0x9e37_79b9_7f4a_7c15);
        for case in 0..200 {
            let n = 1 + rng.below(40);
            let targets = rng.below(5);
            // Half the states have no exit: the rows are then only weakly dominant.
            let exit = |rng: &mut Rng, i: usize| {
                if i + 1 == n || rng.below(2) == 0 {
                    1.0 + rng.below(3) as f64
                } else {
                    0.0
                }
            };
            let a = chain(n, targets, &mut rng, &exit, true);
            let analysis = analyse(&a);
            assert_eq!(
                analysis.predicted_entries,
                dense_symbolic_entries(&a, &analysis.order),
                "case {case}"
            );
            // All sparse, half and half, all dense.
            for dense_from in [n, n / 2, 0] {
                let factors = super::factor(
                    &a,
                    &analysis.order,
                    analysis.predicted_entries,
                    dense_from,
                    &|| false,
                )
                .expect("factors");
                if dense_from == n {
                    assert!(
                        factors.entries() <= analysis.predicted_entries,
                        "case {case}"
                    );
                }
                check_against_dense(&a, &factors, &mut rng, case);
            }
        }
    }

    /// Solves and transposed solves agree with dense elimination and leave small residuals.
    fn check_against_dense(a: &Csr, factors: &DirectFactors, rng: &mut Rng, case: usize) {
        for transposed in [false, true] {
            let b = random_vector(a.n, rng);
            let mut x = b.clone();
            if transposed {
                factors.solve_transposed_in_place(&mut x);
            } else {
                factors.solve_in_place(&mut x);
            }
            let dense = dense_solve(a, &b, transposed);
            let difference: Vec<f64> = x.iter().zip(&dense).map(|(p, q)| p - q).collect();
            assert!(
                norm(&difference) <= 1e-10 * norm(&dense),
                "case {case}: {} vs {}",
                norm(&difference),
                norm(&dense)
            );
            let residual = relative_residual(a, &x, &b, transposed);
            assert!(residual < 1e-12, "case {case}: residual {residual}");
        }
    }

    #[test]
    fn walk_matches_the_ruin_probability() {
        // States z = 1..N-1 are transient; 0 and N absorb. Up 0.4, down 0.5, stay 0.1.
        let n = 200_000;
        let (p, q) = (0.4, 0.5);
        let rows: Vec<Vec<(usize, f64)>> = (0..n)
            .map(|i| {
                let mut row = Vec::new();
                if i > 0 {
                    row.push((i - 1, -q));
                }
                row.push((i, 0.9));
                if i + 1 < n {
                    row.push((i + 1, -p));
                }
                row
            })
            .collect();
        let a = Csr::from_rows(&rows);
        let (analysis, factors) = factor(&a);
        assert!(
            analysis.predicted_entries <= 3 * n,
            "{}",
            analysis.predicted_entries
        );
        assert!(factors.entries() <= analysis.predicted_entries);
        // One step into the top state N, from z = N - 1 only.
        let mut x = vec![0.0; n];
        x[n - 1] = p;
        factors.solve_in_place(&mut x);
        // (1 - r^z) / (1 - r^N) with r = q / p > 1, written as r^(z - N) (1 - r^-z) / (1 - r^-N)
        // so that nothing overflows.
        let big_n = (n + 1) as f64;
        let ln_r = (q / p).ln();
        for (i, &xi) in x.iter().enumerate() {
            let z = (i + 1) as f64;
            let exact =
                ((z - big_n) * ln_r).exp() * (-(-z * ln_r).exp_m1()) / (-(-big_n * ln_r).exp_m1());
            let error = (xi - exact).abs();
            assert!(
                error <= 1e-10 * exact || error <= 1e-290,
                "z = {z}: {xi} vs {exact}"
            );
        }
    }

    #[test]
    fn random_sparse_chain_has_small_residuals() {
        let mut rng = Rng(12345);
        let n = 2000;
        let a = chain(n, 5, &mut rng, &|_, _| 1.0, false);
        let (analysis, factors) = factor(&a);
        assert!(factors.entries() <= analysis.predicted_entries);
        for transposed in [false, true] {
            let b = random_vector(n, &mut rng);
            let mut x = b.clone();
            if transposed {
                factors.solve_transposed_in_place(&mut x);
            } else {
                factors.solve_in_place(&mut x);
            }
            let residual = relative_residual(&a, &x, &b, transposed);
            assert!(residual < 1e-12, "residual {residual}");
        }
    }

    #[test]
    fn dense_chains_use_the_dense_block() {
        let mut rng = Rng(2024);
        for (case, n) in [70usize, 150, 203].into_iter().enumerate() {
            let a = chain(n, 20 * n, &mut rng, &|_, _| 1.0, false);
            let (analysis, factors) = factor(&a);
            assert_eq!(analysis.dense_from, 0, "case {case}");
            assert_eq!(analysis.predicted_entries, n * n);
            check_against_dense(&a, &factors, &mut rng, case);
        }
        // A sparse chain whose tail is dense enough.
        let a = chain(2000, 5, &mut rng, &|_, _| 1.0, false);
        let analysis = analyse(&a);
        assert!(
            analysis.dense_from < 2000 - MIN_DENSE,
            "{}",
            analysis.dense_from
        );
    }

    #[test]
    fn interruption_stops_the_factorization() {
        let mut rng = Rng(7);
        let a = chain(10_000, 3, &mut rng, &|_, _| 1.0, false);
        let analysis = analyse(&a);
        assert_eq!(
            DirectFactors::new(&a, &analysis, &|| true).unwrap_err(),
            DirectError::Interrupted
        );
        // Asked again later: the factorization has started and stops part-way.
        let calls = Cell::new(0);
        let later = || {
            calls.set(calls.get() + 1);
            calls.get() > 1
        };
        assert_eq!(
            DirectFactors::new(&a, &analysis, &later).unwrap_err(),
            DirectError::Interrupted
        );
        assert_eq!(calls.get(), 2);
        // Inside the dense block.
        let calls = Cell::new(0);
        let later = || {
            calls.set(calls.get() + 1);
            calls.get() > 4
        };
        let dense = super::factor(&a, &analysis.order, analysis.predicted_entries, 0, &later);
        assert_eq!(dense.unwrap_err(), DirectError::Interrupted);
    }

    #[test]
    fn singular_matrices_report_a_zero_pivot() {
        // A closed pair of states: I - Q is singular.
        let a = Csr::from_rows(&[vec![(0, 1.0), (1, -1.0)], vec![(0, -1.0), (1, 1.0)]]);
        let analysis = analyse(&a);
        assert!(matches!(
            DirectFactors::new(&a, &analysis, &|| false),
            Err(DirectError::ZeroPivot { .. })
        ));
        let zero = Csr::from_rows(&[vec![(0, 0.0)]]);
        assert_eq!(
            DirectFactors::new(&zero, &analyse(&zero), &|| false).unwrap_err(),
            DirectError::ZeroPivot { row: 0 }
        );
    }

    #[test]
    fn empty_and_single_state() {
        let empty = Csr::from_rows(&[]);
        let (analysis, factors) = factor(&empty);
        assert_eq!(analysis.predicted_entries, 0);
        assert_eq!(factors.entries(), 0);
        factors.solve_in_place(&mut []);
        let one = Csr::from_rows(&[vec![(0, 0.25)]]);
        let (analysis, factors) = factor(&one);
        assert_eq!((analysis.predicted_entries, factors.entries()), (1, 1));
        let mut x = [1.0];
        factors.solve_transposed_in_place(&mut x);
        assert_eq!(x, [4.0]);
    }
}
