//! A square sparse matrix of doubles in compressed rows, the input of the float engines.

/// A square matrix in compressed sparse rows; columns sorted within each row.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Csr {
    /// Number of rows (and columns).
    pub n: usize,
    /// Row `i` occupies `row_start[i]..row_start[i + 1]` of `column` and `value`.
    pub row_start: Vec<usize>,
    /// Column of each stored entry.
    pub column: Vec<usize>,
    /// Value of each stored entry.
    pub value: Vec<f64>,
}

impl Csr {
    /// Builds the matrix from rows of `(column, value)` (any column order; no repeats).
    #[must_use]
    pub fn from_rows(rows: &[Vec<(usize, f64)>]) -> Self {
        let n = rows.len();
        let entries = rows.iter().map(Vec::len).sum();
        let mut matrix = Csr {
            n,
            row_start: Vec::with_capacity(n + 1),
            column: Vec::with_capacity(entries),
            value: Vec::with_capacity(entries),
        };
        matrix.row_start.push(0);
        for row in rows {
            let mut sorted = row.clone();
            sorted.sort_unstable_by_key(|&(j, _)| j);
            for (j, v) in sorted {
                matrix.column.push(j);
                matrix.value.push(v);
            }
            matrix.row_start.push(matrix.column.len());
        }
        matrix
    }

    /// Number of stored entries.
    #[must_use]
    pub fn entries(&self) -> usize {
        self.column.len()
    }

    /// The stored entries of row `i`.
    pub fn row(&self, i: usize) -> impl Iterator<Item = (usize, f64)> + '_ {
        let range = self.row_start[i]..self.row_start[i + 1];
        self.column[range.clone()]
            .iter()
            .copied()
            .zip(self.value[range].iter().copied())
    }

    /// `y = A x`.
    #[must_use]
    pub fn times(&self, x: &[f64]) -> Vec<f64> {
        (0..self.n)
            .map(|i| self.row(i).map(|(j, v)| v * x[j]).sum())
            .collect()
    }

    /// `y = Aᵀ x`.
    #[must_use]
    pub fn transposed_times(&self, x: &[f64]) -> Vec<f64> {
        let mut y = vec![0.0; self.n];
        for (i, &xi) in x.iter().enumerate() {
            for (j, v) in self.row(i) {
                y[j] += v * xi;
            }
        }
        y
    }

    /// The transpose, again in compressed rows.
    #[must_use]
    pub fn transpose(&self) -> Csr {
        let mut count = vec![0usize; self.n + 1];
        for &j in &self.column {
            count[j + 1] += 1;
        }
        for j in 0..self.n {
            count[j + 1] += count[j];
        }
        let mut next = count.clone();
        let mut column = vec![0; self.entries()];
        let mut value = vec![0.0; self.entries()];
        for i in 0..self.n {
            for (j, v) in self.row(i) {
                column[next[j]] = i;
                value[next[j]] = v;
                next[j] += 1;
            }
        }
        Csr {
            n: self.n,
            row_start: count,
            column,
            value,
        }
    }
}
