//! Exact rational solution of `A x = b` and `Aᵀ y = c` by p-adic lifting (Dixon's method).
//!
//! The matrix is scaled row by row to integers and factored once modulo a word-size prime `p`.
//! Each right-hand side is then lifted digit by digit: with `r_0 = b`, the digit
//! `x_i = A⁻¹ r_i mod p` comes from the modular factors and `r_{i+1} = (r_i - A x_i) / p` is an
//! exact integer division, so `A (x_0 + x_1 p + … + x_{k-1} p^{k-1}) ≡ b (mod p^k)` while the
//! residual stays as small as the matrix entries. Once `p^k` is large enough, rational
//! reconstruction turns the p-adic expansion into the rational solution, which is checked exactly
//! against the system before it is returned.
//!
//! Costs: one factorization modulo `p` (dense `O(n³)` with contiguous rows, or sparse in an
//! approximate-minimum-degree order), then per digit one modular triangular solve and one product
//! with the small integer matrix. The number of digits follows the size of the answer: a
//! reconstruction is attempted every time the expansion grew by an eighth, and a Hadamard bound on
//! the determinant caps the number of digits.
//!
//! Reconstruction uses a common denominator: a random combination of all entries is reconstructed
//! first; its denominator `d` is, with high probability, the lcm of all denominators. Then
//! `z = d A⁻¹ b` is an integer vector, lifted directly (right-hand side `d b`) for just enough
//! digits, so each entry costs one base conversion; an entry that does not fit is reconstructed on
//! its own and the common denominator grows. Further right-hand sides first try the previous
//! denominator, which usually skips their long lifting. Big-integer Euclid runs in Lehmer's
//! word-size batches, and the final reduction to lowest terms needs one gcd for the whole vector
//! where the entries are coprime to the denominator.
//!
//! Errors: `Interrupted` whenever the caller's `interrupted()` says so (polled between bounded
//! pieces of work), `UnluckyPrimes` when each of three primes divides an elimination pivot (or,
//! which would be a defect, lifting exceeds its determinant bound); the caller then falls back to
//! another exact method.

use std::cmp::{Ordering, Reverse};
use std::collections::{BTreeMap, BTreeSet, BinaryHeap};

use num_bigint::{BigInt, BigUint, Sign};
use num_integer::Integer;
use num_rational::BigRational;
use num_traits::{One, Signed, ToPrimitive, Zero};

/// One row of a sparse matrix: `(column, value)` pairs sorted by column, diagonal present.
pub type SparseRow = Vec<(usize, BigRational)>;

/// Why a p-adic solve produced no answer.
#[derive(Debug, Clone, PartialEq)]
pub enum PadicError {
    /// `interrupted()` returned true before the work was done.
    Interrupted,
    /// Every prime tried divides a pivot of the elimination (or the lifting did not converge
    /// within the determinant bound); the caller should fall back to another exact method.
    UnluckyPrimes,
}

impl std::fmt::Display for PadicError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            PadicError::Interrupted => write!(f, "p-adic solve interrupted"),
            PadicError::UnluckyPrimes => write!(f, "no usable prime for p-adic lifting"),
        }
    }
}

impl std::error::Error for PadicError {}

/// Primes are taken below this bound: sums of two residues and `2p` stay below 2^63, and the
/// Shoup products and lazily accumulated dot products stay exact in `u128`.
const PRIME_LIMIT: u64 = 1 << 62;
/// Lower bound on `log2 p` for every prime used (they all lie just below `PRIME_LIMIT`).
const PRIME_BITS_FLOOR: u64 = 61;
/// How many primes are tried before giving up with `UnluckyPrimes`.
const MAX_PRIMES: usize = 3;
/// Extra bits demanded by every reconstruction beyond uniqueness: a spurious candidate from too
/// few digits then passes with probability about 2^-SLACK_BITS.
const SLACK_BITS: u64 = 40;
/// Bits of the random weights of the combination whose denominator is reconstructed first.
const WEIGHT_BITS: u32 = 20;
/// Fill (fraction of nonzero entries) from which the dense factorization is used.
const DENSE_FILL: f64 = 0.2;
/// Matrices up to this order are always factored densely.
const DENSE_ALWAYS: usize = 32;
/// Largest absolute row or column sum `S` of the integer matrix for which residuals live in
/// `i128`. With right-hand-side digits `t` below 2^124 added per step, `|r| <= |r|/p + S + t`
/// keeps `|r| < 2^124 + 2^63`, so `|r - A x| < |r| + S p < 2^126`.
const SMALL_SUM_LIMIT: u128 = 1 << 62;
/// Right-hand sides with entries below this magnitude start the residual directly.
const SMALL_RHS_BITS: u64 = 100;

// ---------------------------------------------------------------------------------------------
// Arithmetic modulo a word-size prime
// ---------------------------------------------------------------------------------------------

/// A prime `p = 2^62 - c` with small `c`, and precomputed constants.
#[derive(Clone, Copy, Debug)]
struct Modulus {
    p: u64,
    /// `2^64 mod p = 4c`: small, so a 128-bit value folds to a residue with two short products
    /// instead of a division.
    r64: u64,
    /// `2^128 mod p`, to fold the overflow count of a lazy dot product.
    r128: u64,
    /// `p⁻¹ mod 2^128`: an exact division by `p` is one wrapping multiplication.
    pinv: u128,
}

/// Largest `c` accepted in `p = 2^62 - c` (the primes used are the few just below 2^62).
const MAX_PRIME_GAP: u64 = 1 << 14;

impl Modulus {
    fn new(p: u64) -> Self {
        assert!(
            p < PRIME_LIMIT && PRIME_LIMIT - p < MAX_PRIME_GAP,
            "prime too far below 2^62"
        );
        let r64 = ((1u128 << 64) % p as u128) as u64;
        let r128 = ((r64 as u128 * r64 as u128) % p as u128) as u64;
        // Newton's iteration doubles the number of correct low bits each round.
        let mut pinv: u128 = 1;
        for _ in 0..7 {
            pinv = pinv.wrapping_mul(2u128.wrapping_sub((p as u128).wrapping_mul(pinv)));
        }
        debug_assert_eq!((p as u128).wrapping_mul(pinv), 1);
        Modulus { p, r64, r128, pinv }
    }

    /// `x mod p` for any 128-bit `x`: `2^64 ≡ r64` folds the high word twice, then the quotient
    /// by `2^62` is nearly exact.
    #[inline(always)]
    fn reduce_u128(&self, x: u128) -> u64 {
        let r = self.r64 as u128;
        let mut y = (x >> 64) * r + (x as u64 as u128); // < 2^81
        while y >> 64 != 0 {
            // At most twice more: < 2^64 + 2^32, then < 2^64 + 2^16.
            y = (y >> 64) * r + (y as u64 as u128);
        }
        let z = y as u64;
        let q = z >> 62;
        // z - q p = (z mod 2^62) + q c < 2^62 + 4c < 2p.
        let t = z - q * self.p;
        if t >= self.p {
            t - self.p
        } else {
            t
        }
    }

    #[inline(always)]
    fn add(&self, a: u64, b: u64) -> u64 {
        let s = a + b;
        if s >= self.p {
            s - self.p
        } else {
            s
        }
    }

    #[inline(always)]
    fn sub(&self, a: u64, b: u64) -> u64 {
        if a >= b {
            a - b
        } else {
            a + self.p - b
        }
    }

    #[inline(always)]
    fn mul(&self, a: u64, b: u64) -> u64 {
        self.reduce_u128(a as u128 * b as u128)
    }

    /// Shoup's precomputed quotient `floor(w · 2^64 / p)` for repeated products with `w`.
    #[inline(always)]
    fn shoup(&self, w: u64) -> u64 {
        (((w as u128) << 64) / self.p as u128) as u64
    }

    /// `w · x mod p` with `wsh = shoup(w)`: two multiplications and no division.
    #[inline(always)]
    fn mul_shoup(&self, w: u64, wsh: u64, x: u64) -> u64 {
        let q = ((wsh as u128 * x as u128) >> 64) as u64;
        let t = w.wrapping_mul(x).wrapping_sub(q.wrapping_mul(self.p));
        if t >= self.p {
            t - self.p
        } else {
            t
        }
    }

    fn pow(&self, mut a: u64, mut e: u64) -> u64 {
        let mut r = 1u64;
        while e > 0 {
            if e & 1 == 1 {
                r = self.mul(r, a);
            }
            a = self.mul(a, a);
            e >>= 1;
        }
        r
    }

    fn inv(&self, a: u64) -> u64 {
        self.pow(a, self.p - 2)
    }

    /// Folds a 192-bit sum `hi · 2^128 + lo` to a residue.
    #[inline(always)]
    fn fold(&self, lo: u128, hi: u64) -> u64 {
        let l = self.reduce_u128(lo);
        if hi == 0 {
            l
        } else {
            self.add(l, self.mul(hi % self.p, self.r128))
        }
    }

    /// `Σ a_i b_i mod p`. Products are below 2^124, so sixteen of them fit an unreduced `u128`:
    /// four independent accumulators take sixteen products each before one reduction apiece.
    #[inline]
    fn dot(&self, a: &[u64], b: &[u64]) -> u64 {
        debug_assert_eq!(a.len(), b.len());
        let mut total: u64 = 0;
        for (x, y) in a.chunks(64).zip(b.chunks(64)) {
            let mut s = [0u128; 4];
            let (xc, yc) = (x.chunks_exact(4), y.chunks_exact(4));
            let (xr, yr) = (xc.remainder(), yc.remainder());
            for (x4, y4) in xc.zip(yc) {
                for u in 0..4 {
                    s[u] += x4[u] as u128 * y4[u] as u128;
                }
            }
            for (u, (&xv, &yv)) in xr.iter().zip(yr).enumerate() {
                s[u] += xv as u128 * yv as u128;
            }
            for v in s {
                total = self.add(total, self.reduce_u128(v));
            }
        }
        total
    }

    /// `Σ vals_i · v[idx_i] mod p`, as `dot` over a sparse row.
    #[inline]
    fn dot_gather(&self, vals: &[u64], idx: &[usize], v: &[u64]) -> u64 {
        let mut lo: u128 = 0;
        let mut hi: u64 = 0;
        for (&x, &j) in vals.iter().zip(idx) {
            let (s, o) = lo.overflowing_add(x as u128 * v[j] as u128);
            lo = s;
            hi += o as u64;
        }
        self.fold(lo, hi)
    }

    #[inline(always)]
    fn reduce_i128(&self, v: i128) -> u64 {
        let r = self.reduce_u128(v.unsigned_abs());
        if v >= 0 || r == 0 {
            r
        } else {
            self.p - r
        }
    }

    fn reduce_i64(&self, v: i64) -> u64 {
        self.reduce_i128(v as i128)
    }

    fn reduce_big(&self, v: &BigInt) -> u64 {
        v.mod_floor(&BigInt::from(self.p))
            .to_u64()
            .expect("residue fits a word")
    }

    /// `v / p` for a multiple `v` of `p` (exact division is multiplication by the inverse).
    #[inline(always)]
    fn exact_div(&self, v: i128) -> i128 {
        (v as u128).wrapping_mul(self.pinv) as i128
    }
}

fn mulmod_plain(a: u64, b: u64, m: u64) -> u64 {
    ((a as u128 * b as u128) % m as u128) as u64
}

fn powmod_plain(mut a: u64, mut e: u64, m: u64) -> u64 {
    let mut r = 1u64 % m;
    a %= m;
    while e > 0 {
        if e & 1 == 1 {
            r = mulmod_plain(r, a, m);
        }
        a = mulmod_plain(a, a, m);
        e >>= 1;
    }
    r
}

/// Deterministic Miller–Rabin for 64-bit integers (these bases are a proven witness set).
fn is_prime_u64(n: u64) -> bool {
    if n < 2 {
        return false;
    }
    const BASES: [u64; 12] = [2, 3, 5, 7, 11, 13, 17, 19, 23, 29, 31, 37];
    for &b in &BASES {
        if n.is_multiple_of(b) {
            return n == b;
        }
    }
    let s = (n - 1).trailing_zeros();
    let d = (n - 1) >> s;
    'bases: for &a in &BASES {
        let mut x = powmod_plain(a, d, n);
        if x == 1 || x == n - 1 {
            continue;
        }
        for _ in 1..s {
            x = mulmod_plain(x, x, n);
            if x == n - 1 {
                continue 'bases;
            }
        }
        return false;
    }
    true
}

/// The primes below `PRIME_LIMIT`, largest first.
fn lifting_primes() -> impl Iterator<Item = u64> {
    (1..PRIME_LIMIT / 2)
        .map(|i| PRIME_LIMIT - 2 * i + 1)
        .filter(|&c| is_prime_u64(c))
}

// ---------------------------------------------------------------------------------------------
// Sparse storage
// ---------------------------------------------------------------------------------------------

/// Compressed rows: row `i` holds `idx[ptr[i]..ptr[i+1]]` with values `val[..]`.
#[derive(Clone, Debug)]
struct Csr<T> {
    ptr: Vec<usize>,
    idx: Vec<usize>,
    val: Vec<T>,
}

impl<T: Clone> Csr<T> {
    fn row(&self, i: usize) -> (&[usize], &[T]) {
        let r = self.ptr[i]..self.ptr[i + 1];
        (&self.idx[r.clone()], &self.val[r])
    }

    /// The transpose, with rows again sorted by column.
    fn transpose(&self, n: usize) -> Csr<T> {
        let mut count = vec![0usize; n + 1];
        for &j in &self.idx {
            count[j + 1] += 1;
        }
        for j in 0..n {
            count[j + 1] += count[j];
        }
        let ptr = count.clone();
        let mut next = count;
        let mut idx = vec![0usize; self.idx.len()];
        let mut val: Vec<Option<T>> = vec![None; self.idx.len()];
        for i in 0..n {
            for k in self.ptr[i]..self.ptr[i + 1] {
                let j = self.idx[k];
                idx[next[j]] = i;
                val[next[j]] = Some(self.val[k].clone());
                next[j] += 1;
            }
        }
        Csr {
            ptr,
            idx,
            val: val.into_iter().map(|v| v.expect("filled")).collect(),
        }
    }
}

/// `lcm(acc, d)`, cheap cases first: a binary gcd of numbers with thousands of bits takes
/// milliseconds, and the entries of one solution (the right-hand sides of a second batch) nearly
/// always share one denominator.
fn lcm_with(acc: BigInt, d: &BigInt) -> BigInt {
    if d.is_one() || &acc == d || (&acc % d).is_zero() {
        acc
    } else {
        acc.lcm(d)
    }
}

/// `v · s` for an integer `s`, reducing by `gcd(s, denominator)` computed from the small side
/// (the generic product runs binary gcds over the big denominator).
fn scale_rational(v: &BigRational, s: &BigInt) -> BigRational {
    if s.is_one() {
        return v.clone();
    }
    let g = (v.denom() % s).gcd(s);
    if g.is_zero() {
        return BigRational::from_integer(v.numer() * s);
    }
    BigRational::new_raw(v.numer() * (s / &g), v.denom() / &g)
}

/// The integer matrix `A'` (rows of `A` times their denominators' lcm), in the width that its
/// residual products need.
enum IntMatrix {
    /// Every absolute row and column sum is below `SMALL_SUM_LIMIT`.
    Small {
        rows: Csr<i64>,
        cols: Csr<i64>,
        /// Row-major `A'` and `A'ᵀ` when the factorization is dense: contiguous rows make the
        /// residual product a plain streaming loop.
        dense: Option<(Vec<i64>, Vec<i64>)>,
    },
    /// Some entry or sum is too wide: residuals are big integers (slow, but exact).
    Big {
        rows: Csr<BigInt>,
        cols: Csr<BigInt>,
    },
}

// ---------------------------------------------------------------------------------------------
// Factorizations modulo p
// ---------------------------------------------------------------------------------------------

/// `P A' = L U` modulo `p`, row-major in one array (unit `L` below the diagonal), with row
/// pivoting only where a diagonal pivot vanishes modulo `p`.
struct DenseLu {
    n: usize,
    lu: Vec<u64>,
    /// The transpose of `lu`, so the transposed solves also run along contiguous rows.
    lut: Vec<u64>,
    /// Row `i` of `P A'` is row `perm[i]` of `A'`.
    perm: Vec<usize>,
    uinv: Vec<u64>,
}

/// `B = L U` modulo `p` for the symmetric permutation `B = A'[order][order]`, diagonal pivots.
struct SparseLu {
    n: usize,
    /// Position `i` of `B` is index `order[i]` of `A'`.
    order: Vec<usize>,
    /// Strictly lower part of `L` by rows (unit diagonal implied).
    l: Csr<u64>,
    /// Strictly upper part of `U` by rows.
    u: Csr<u64>,
    uinv: Vec<u64>,
}

enum Factors {
    Dense(DenseLu),
    Sparse(SparseLu),
}

impl DenseLu {
    /// Factors the `n × n` row-major matrix `a` (entries reduced mod `p`); `None` if it is
    /// singular modulo `p`.
    ///
    /// Row-by-row Doolittle order: every entry of row `i` is its original value minus one dot
    /// product of the finished part of the row of `L` with a column of `U` (kept transposed, so
    /// both are contiguous). Each entry is reduced once instead of once per pivot.
    fn factor(
        n: usize,
        mut a: Vec<u64>,
        m: &Modulus,
        interrupted: &dyn Fn() -> bool,
    ) -> Result<Option<DenseLu>, PadicError> {
        let mut perm: Vec<usize> = (0..n).collect();
        let mut uinv = vec![0u64; n];
        // ut[j * n + k] = U[k][j] for k <= j.
        let mut ut = vec![0u64; n * n];
        let mut original = vec![0u64; n];
        for i in 0..n {
            if i % 4 == 0 && interrupted() {
                return Err(PadicError::Interrupted);
            }
            let mut candidate = i;
            loop {
                let row = &mut a[i * n..(i + 1) * n];
                original.copy_from_slice(row);
                for j in 0..i {
                    let s = m.dot(&row[..j], &ut[j * n..j * n + j]);
                    row[j] = m.mul(m.sub(row[j], s), uinv[j]);
                }
                let s = m.dot(&row[..i], &ut[i * n..i * n + i]);
                let pivot = m.sub(row[i], s);
                if pivot != 0 {
                    row[i] = pivot;
                    break;
                }
                // p divides this pivot (it is nonzero over the rationals): bring in a later row.
                row.copy_from_slice(&original);
                candidate += 1;
                if candidate == n {
                    return Ok(None);
                }
                let (head, tail) = a.split_at_mut(candidate * n);
                head[i * n..(i + 1) * n].swap_with_slice(&mut tail[..n]);
                perm.swap(i, candidate);
            }
            let row = &mut a[i * n..(i + 1) * n];
            for j in i + 1..n {
                let s = m.dot(&row[..i], &ut[j * n..j * n + i]);
                row[j] = m.sub(row[j], s);
            }
            for j in i..n {
                ut[j * n + i] = row[j];
            }
            uinv[i] = m.inv(row[i]);
        }
        let mut lut = ut;
        for i in 0..n {
            for j in 0..i {
                lut[j * n + i] = a[i * n + j];
            }
        }
        Ok(Some(DenseLu {
            n,
            lu: a,
            lut,
            perm,
            uinv,
        }))
    }

    /// `x = A'⁻¹ r mod p`.
    fn solve(&self, m: &Modulus, r: &[u64]) -> Vec<u64> {
        let n = self.n;
        let mut y: Vec<u64> = self.perm.iter().map(|&i| r[i]).collect();
        for i in 0..n {
            let s = m.dot(&self.lu[i * n..i * n + i], &y[..i]);
            y[i] = m.sub(y[i], s);
        }
        for i in (0..n).rev() {
            let s = m.dot(&self.lu[i * n + i + 1..(i + 1) * n], &y[i + 1..]);
            y[i] = m.mul(m.sub(y[i], s), self.uinv[i]);
        }
        y
    }

    /// `x = A'⁻ᵀ r mod p`: `A'ᵀ = Uᵀ Lᵀ P`.
    fn solve_transposed(&self, m: &Modulus, r: &[u64]) -> Vec<u64> {
        let n = self.n;
        let mut w = r.to_vec();
        for i in 0..n {
            let s = m.dot(&self.lut[i * n..i * n + i], &w[..i]);
            w[i] = m.mul(m.sub(w[i], s), self.uinv[i]);
        }
        for i in (0..n).rev() {
            let s = m.dot(&self.lut[i * n + i + 1..(i + 1) * n], &w[i + 1..]);
            w[i] = m.sub(w[i], s);
        }
        let mut x = vec![0u64; n];
        for (i, &v) in w.iter().enumerate() {
            x[self.perm[i]] = v;
        }
        x
    }
}

impl SparseLu {
    /// Up-looking elimination of `B = A'[order][order]` row by row: each row is scattered into a
    /// dense work vector and reduced by the earlier rows of `U` in increasing column order (a heap
    /// yields the columns, including fill). `None` if a pivot vanishes modulo `p`.
    fn factor(
        n: usize,
        pattern: &Csr<u64>,
        order: Vec<usize>,
        m: &Modulus,
        interrupted: &dyn Fn() -> bool,
    ) -> Result<Option<SparseLu>, PadicError> {
        let mut pos = vec![0usize; n];
        for (i, &o) in order.iter().enumerate() {
            pos[o] = i;
        }
        let mut w = vec![0u64; n];
        let mut mark = vec![usize::MAX; n];
        let mut pat: Vec<usize> = Vec::new();
        let mut heap: BinaryHeap<Reverse<usize>> = BinaryHeap::new();
        let mut l = Csr {
            ptr: vec![0],
            idx: Vec::new(),
            val: Vec::new(),
        };
        let mut u = Csr {
            ptr: vec![0],
            idx: Vec::new(),
            val: Vec::new(),
        };
        let mut uinv = Vec::with_capacity(n);
        for i in 0..n {
            if i % 32 == 0 && interrupted() {
                return Err(PadicError::Interrupted);
            }
            pat.clear();
            let (cols, vals) = pattern.row(order[i]);
            for (&c, &v) in cols.iter().zip(vals) {
                let j = pos[c];
                mark[j] = i;
                w[j] = v;
                pat.push(j);
                if j < i {
                    heap.push(Reverse(j));
                }
            }
            while let Some(Reverse(k)) = heap.pop() {
                let lk = m.mul(w[k], uinv[k]);
                if lk == 0 {
                    continue;
                }
                l.idx.push(k);
                l.val.push(lk);
                let lsh = m.shoup(lk);
                let (ucols, uvals) = (
                    &u.idx[u.ptr[k]..u.ptr[k + 1]],
                    &u.val[u.ptr[k]..u.ptr[k + 1]],
                );
                for (&j, &uv) in ucols.iter().zip(uvals) {
                    if mark[j] != i {
                        mark[j] = i;
                        w[j] = 0;
                        pat.push(j);
                        if j < i {
                            heap.push(Reverse(j));
                        }
                    }
                    w[j] = m.sub(w[j], m.mul_shoup(lk, lsh, uv));
                }
            }
            l.ptr.push(l.idx.len());
            let d = w[i];
            if d == 0 {
                return Ok(None);
            }
            uinv.push(m.inv(d));
            for &j in &pat {
                if j > i && w[j] != 0 {
                    u.idx.push(j);
                    u.val.push(w[j]);
                }
            }
            u.ptr.push(u.idx.len());
        }
        Ok(Some(SparseLu {
            n,
            order,
            l,
            u,
            uinv,
        }))
    }

    fn solve(&self, m: &Modulus, r: &[u64]) -> Vec<u64> {
        let n = self.n;
        let mut z: Vec<u64> = self.order.iter().map(|&o| r[o]).collect();
        for i in 0..n {
            let (idx, vals) = self.l.row(i);
            let s = m.dot_gather(vals, idx, &z);
            z[i] = m.sub(z[i], s);
        }
        for i in (0..n).rev() {
            let (idx, vals) = self.u.row(i);
            let s = m.dot_gather(vals, idx, &z);
            z[i] = m.mul(m.sub(z[i], s), self.uinv[i]);
        }
        let mut x = vec![0u64; n];
        for (i, &o) in self.order.iter().enumerate() {
            x[o] = z[i];
        }
        x
    }

    /// `Bᵀ = Uᵀ Lᵀ`, solved column-oriented on the row storage.
    fn solve_transposed(&self, m: &Modulus, r: &[u64]) -> Vec<u64> {
        let n = self.n;
        let mut z: Vec<u64> = self.order.iter().map(|&o| r[o]).collect();
        for i in 0..n {
            let zi = m.mul(z[i], self.uinv[i]);
            z[i] = zi;
            if zi != 0 {
                let sh = m.shoup(zi);
                let (idx, vals) = self.u.row(i);
                for (&j, &v) in idx.iter().zip(vals) {
                    z[j] = m.sub(z[j], m.mul_shoup(zi, sh, v));
                }
            }
        }
        for i in (0..n).rev() {
            let zi = z[i];
            if zi != 0 {
                let sh = m.shoup(zi);
                let (idx, vals) = self.l.row(i);
                for (&k, &v) in idx.iter().zip(vals) {
                    z[k] = m.sub(z[k], m.mul_shoup(zi, sh, v));
                }
            }
        }
        let mut x = vec![0u64; n];
        for (i, &o) in self.order.iter().enumerate() {
            x[o] = z[i];
        }
        x
    }
}

impl Factors {
    fn solve(&self, m: &Modulus, r: &[u64], transposed: bool) -> Vec<u64> {
        match (self, transposed) {
            (Factors::Dense(f), false) => f.solve(m, r),
            (Factors::Dense(f), true) => f.solve_transposed(m, r),
            (Factors::Sparse(f), false) => f.solve(m, r),
            (Factors::Sparse(f), true) => f.solve_transposed(m, r),
        }
    }
}

/// A fill-reducing symmetric order: approximate minimum degree on the pattern of `A + Aᵀ`.
fn fill_reducing_order(n: usize, rows: &Csr<u64>) -> Vec<usize> {
    let control = amd::Control::default();
    match amd::order::<usize>(n, &rows.ptr, &rows.idx, &control) {
        Ok((p, _, _)) if p.len() == n => p,
        // The natural order is valid too (diagonal pivots never vanish over the rationals).
        _ => (0..n).collect(),
    }
}

// ---------------------------------------------------------------------------------------------
// Multi-word helpers (little-endian u64 limbs, no trailing zeros)
// ---------------------------------------------------------------------------------------------

fn trim(v: &mut Vec<u64>) {
    while v.last() == Some(&0) {
        v.pop();
    }
}

fn from_limbs(l: &[u64]) -> BigUint {
    let mut v = Vec::with_capacity(2 * l.len());
    for &w in l {
        v.push(w as u32);
        v.push((w >> 32) as u32);
    }
    BigUint::new(v)
}

fn limb_bits(l: &[u64]) -> u64 {
    match l.last() {
        None => 0,
        Some(&top) => 64 * (l.len() as u64 - 1) + (64 - top.leading_zeros() as u64),
    }
}

fn cmp_limbs(a: &[u64], b: &[u64]) -> Ordering {
    a.len()
        .cmp(&b.len())
        .then_with(|| a.iter().rev().cmp(b.iter().rev()))
}

/// The word `(x >> shift) mod 2^64`.
fn shr_word(x: &[u64], shift: u64) -> u64 {
    let w = (shift / 64) as usize;
    let b = shift % 64;
    let lo = x.get(w).copied().unwrap_or(0);
    let hi = x.get(w + 1).copied().unwrap_or(0);
    if b == 0 {
        lo
    } else {
        (lo >> b) | (hi << (64 - b))
    }
}

/// `acc += a · x`.
fn mac_limbs(acc: &mut Vec<u64>, x: &[u64], a: u64) {
    if acc.len() < x.len() + 1 {
        acc.resize(x.len() + 1, 0);
    }
    let mut carry: u64 = 0;
    for (i, &xi) in x.iter().enumerate() {
        let t = xi as u128 * a as u128 + acc[i] as u128 + carry as u128;
        acc[i] = t as u64;
        carry = (t >> 64) as u64;
    }
    let mut i = x.len();
    while carry != 0 {
        if i == acc.len() {
            acc.push(0);
        }
        let (s, o) = acc[i].overflowing_add(carry);
        acc[i] = s;
        carry = o as u64;
        i += 1;
    }
}

/// `a · x + b · y` for cofactors of opposite signs whose result is known to be nonnegative.
fn lin_comb_signed(x: &[u64], y: &[u64], a: i64, b: i64) -> Vec<u64> {
    let len = x.len().max(y.len());
    let mut out = Vec::with_capacity(len);
    let mut carry: i128 = 0;
    let (a, b) = (a as i128, b as i128);
    for i in 0..len {
        let xi = x.get(i).copied().unwrap_or(0) as i128;
        let yi = y.get(i).copied().unwrap_or(0) as i128;
        // |a|, |b| <= 2^61: each product is below 2^125 in magnitude.
        let s = a * xi + b * yi + carry;
        out.push(s as u64);
        carry = s >> 64;
    }
    debug_assert_eq!(carry, 0, "linear combination went negative");
    trim(&mut out);
    out
}

/// `a · x + b · y` for nonnegative cofactors.
fn lin_comb_abs(x: &[u64], y: &[u64], a: u64, b: u64) -> Vec<u64> {
    let len = x.len().max(y.len());
    let mut out = Vec::with_capacity(len + 1);
    let mut carry: u128 = 0;
    for i in 0..len {
        let xi = x.get(i).copied().unwrap_or(0) as u128;
        let yi = y.get(i).copied().unwrap_or(0) as u128;
        let s = a as u128 * xi + b as u128 * yi + carry;
        out.push(s as u64);
        carry = s >> 64;
    }
    if carry != 0 {
        out.push(carry as u64);
    }
    trim(&mut out);
    out
}

/// Lehmer's method on the leading 62 bits `(u, v)` of a remainder pair: the cofactor matrix
/// `(a, b; c, d)` of as many Euclidean steps as are certain from these bits (a quotient is kept
/// only when both ends of its uncertainty interval agree), and their number. Cofactors stay
/// within 2^61 so the multi-word combinations cannot overflow.
fn lehmer_matrix(mut u: i64, mut v: i64) -> (i64, i64, i64, i64, u32) {
    let (mut a, mut b, mut c, mut d) = (1i64, 0i64, 0i64, 1i64);
    let mut steps = 0;
    loop {
        let (vc, vd) = (v + c, v + d);
        if vc <= 0 || vd <= 0 || u + a < 0 || u + b < 0 {
            break;
        }
        let q = (u + a) / vc;
        if q != (u + b) / vd {
            break;
        }
        let nc = a as i128 - q as i128 * c as i128;
        let nd = b as i128 - q as i128 * d as i128;
        const CAP: i128 = 1 << 61;
        if nc.abs() > CAP || nd.abs() > CAP {
            break;
        }
        a = c;
        c = nc as i64;
        b = d;
        d = nd as i64;
        let nv = u - q * v;
        u = v;
        v = nv;
        steps += 1;
    }
    (a, b, c, d, steps)
}

/// The Euclidean remainder sequence `r0 > r1 > …` with the magnitudes of the cofactors `t` of the
/// second starting value (`r_i ≡ ±t_i · s` modulo the first), run in Lehmer batches.
struct Euclid {
    r0: Vec<u64>,
    r1: Vec<u64>,
    t0: Vec<u64>,
    t1: Vec<u64>,
    track: bool,
    /// Sign of the cofactor belonging to `r1`.
    t1_positive: bool,
}

impl Euclid {
    /// Starts from `(m, s)` with `m >= s`.
    fn new(m: &BigUint, s: &BigUint, track: bool) -> Self {
        Euclid {
            r0: m.to_u64_digits(),
            r1: s.to_u64_digits(),
            t0: Vec::new(),
            t1: vec![1],
            track,
            t1_positive: true,
        }
    }

    /// Runs until `r1 <= stop` or `r0` has fewer than `min_bits` bits. A Lehmer batch shrinks
    /// `r0` by at most 62 bits, so batches are only used while `r0` is more than 66 bits above
    /// `stop`: the first remainder not above `stop` is then never skipped.
    fn run(&mut self, stop: &[u64], min_bits: u64) {
        let stop_bits = limb_bits(stop);
        while cmp_limbs(&self.r1, stop) == Ordering::Greater {
            let b0 = limb_bits(&self.r0);
            if b0 < min_bits {
                return;
            }
            if b0 >= stop_bits + 66 && b0 >= 128 {
                let sh = b0 - 62;
                let uh = shr_word(&self.r0, sh) as i64;
                let vh = shr_word(&self.r1, sh) as i64;
                let (a, b, c, d, steps) = lehmer_matrix(uh, vh);
                if steps > 0 {
                    let r0 = lin_comb_signed(&self.r0, &self.r1, a, b);
                    let r1 = lin_comb_signed(&self.r0, &self.r1, c, d);
                    self.r0 = r0;
                    self.r1 = r1;
                    if self.track {
                        let (ua, ub, uc, ud) = (
                            a.unsigned_abs(),
                            b.unsigned_abs(),
                            c.unsigned_abs(),
                            d.unsigned_abs(),
                        );
                        let t0 = lin_comb_abs(&self.t0, &self.t1, ua, ub);
                        let t1 = lin_comb_abs(&self.t0, &self.t1, uc, ud);
                        self.t0 = t0;
                        self.t1 = t1;
                    }
                    if steps % 2 == 1 {
                        self.t1_positive = !self.t1_positive;
                    }
                    continue;
                }
            }
            self.plain_step();
        }
    }

    fn plain_step(&mut self) {
        let (q, r) = from_limbs(&self.r0).div_rem(&from_limbs(&self.r1));
        self.r0 = std::mem::take(&mut self.r1);
        self.r1 = r.to_u64_digits();
        if self.track {
            let t = from_limbs(&self.t0) + q * from_limbs(&self.t1);
            self.t0 = std::mem::take(&mut self.t1);
            self.t1 = t.to_u64_digits();
        }
        self.t1_positive = !self.t1_positive;
    }
}

/// `gcd(a, b)` with Lehmer steps for the large part.
fn gcd_big(a: &BigUint, b: &BigUint) -> BigUint {
    let (a, b) = if a >= b { (a, b) } else { (b, a) };
    if b.is_zero() {
        return a.clone();
    }
    if a.bits() <= 192 {
        return a.gcd(b);
    }
    let mut e = Euclid::new(a, b, false);
    e.run(&[], 192);
    if e.r1.is_empty() {
        return from_limbs(&e.r0);
    }
    from_limbs(&e.r0).gcd(&from_limbs(&e.r1))
}

/// Rational reconstruction: `n / d ≡ s (mod m)` with `|n| <= nb`, `0 < d <= db` and `p ∤ d`,
/// taken at the first remainder not above `nb` (unique when `2 · nb · db < m`).
fn rational_reconstruction(
    s: &BigUint,
    m: &BigUint,
    nb: &BigUint,
    db: &BigUint,
    p: u64,
) -> Option<(BigInt, BigUint)> {
    let mut e = Euclid::new(m, s, true);
    e.run(&nb.to_u64_digits(), 0);
    let den = from_limbs(&e.t1);
    if den.is_zero() || &den > db || (&den % p).is_zero() {
        return None;
    }
    let num = BigInt::from_biguint(
        if e.t1_positive {
            Sign::Plus
        } else {
            Sign::Minus
        },
        from_limbs(&e.r1),
    );
    Some((num, den))
}

/// Barrett reduction modulo a fixed `m`: two multiplications instead of a long division.
struct Barrett {
    m: BigUint,
    s: u64,
    r: BigUint,
}

impl Barrett {
    fn new(m: BigUint) -> Self {
        let s = m.bits().max(1);
        let r = (BigUint::one() << (2 * s)) / &m;
        Barrett { m, s, r }
    }

    /// `x mod m` for `x < 2^(2s)`.
    fn reduce(&self, x: &BigUint) -> BigUint {
        debug_assert!(x.bits() <= 2 * self.s);
        let q = ((x >> (self.s - 1)) * &self.r) >> (self.s + 1);
        let mut t = x - q * &self.m;
        while t >= self.m {
            t -= &self.m;
        }
        t
    }

    fn reduce_any(&self, x: &BigUint) -> BigUint {
        if x.bits() <= 2 * self.s {
            self.reduce(x)
        } else {
            x % &self.m
        }
    }
}

/// A digit of a p-adic expansion: a residue, or a sum of weighted residues.
trait Digit: Copy {
    fn add_to(self, acc: &mut BigUint);
}

impl Digit for u64 {
    fn add_to(self, acc: &mut BigUint) {
        *acc += self;
    }
}

impl Digit for u128 {
    fn add_to(self, acc: &mut BigUint) {
        *acc += self;
    }
}

/// Powers of `p`, for turning digit sequences into integers by divide and conquer.
struct Powers {
    p: u64,
    /// `p^(2^t)`.
    sq: Vec<BigUint>,
    /// `p^m` for the split points of `build` and the moduli asked for.
    cache: BTreeMap<usize, BigUint>,
    /// Lengths whose split points are all in `cache`.
    prepared: BTreeSet<usize>,
}

/// Digit sequences up to this length are converted by Horner's rule in place.
const LEAF_DIGITS: usize = 16;

impl Powers {
    fn new(p: u64) -> Self {
        Powers {
            p,
            sq: vec![BigUint::from(p)],
            cache: BTreeMap::new(),
            prepared: BTreeSet::new(),
        }
    }

    /// `p^k`.
    fn pow(&mut self, k: usize) -> BigUint {
        if let Some(v) = self.cache.get(&k) {
            return v.clone();
        }
        while (1usize << (self.sq.len() - 1)) < k.max(1) {
            let last = self.sq.last().expect("nonempty");
            let next = last * last;
            self.sq.push(next);
        }
        let mut r = BigUint::one();
        for t in 0..self.sq.len() {
            if k >> t & 1 == 1 {
                r *= &self.sq[t];
            }
        }
        self.cache.insert(k, r.clone());
        r
    }

    /// Makes `build` ready for sequences of `len` digits.
    fn prepare(&mut self, len: usize) {
        if len <= LEAF_DIGITS || self.prepared.contains(&len) {
            return;
        }
        let half = len / 2;
        self.pow(half);
        self.prepare(half);
        self.prepare(len - half);
        self.prepared.insert(len);
    }

    /// `Σ digits[i] p^i` (after `prepare(digits.len())`): balanced halves combined with one
    /// product by a cached power, so the cost is a few balanced big multiplications.
    fn build<D: Digit>(&self, digits: &[D]) -> BigUint {
        let len = digits.len();
        if len <= LEAF_DIGITS {
            let mut acc = BigUint::zero();
            for &d in digits.iter().rev() {
                acc *= self.p;
                d.add_to(&mut acc);
            }
            return acc;
        }
        let half = len / 2;
        let lo = self.build(&digits[..half]);
        let hi = self.build(&digits[half..]);
        hi * &self.cache[&half] + lo
    }
}

fn log2_big(x: &BigInt) -> f64 {
    let bits = x.bits();
    if bits <= 1000 {
        x.to_f64().map(|v| v.abs().log2()).unwrap_or(bits as f64)
    } else {
        let top = (x.magnitude() >> (bits - 64)).to_f64().unwrap_or(1.0);
        top.log2() + (bits - 64) as f64
    }
}

/// `log2(Σ 2^(2 l_i))` for entries of magnitude `2^(l_i)`, without overflow.
fn log2_norm2(logs: &[f64]) -> f64 {
    let top = logs.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    if top == f64::NEG_INFINITY {
        return f64::NEG_INFINITY;
    }
    let s: f64 = logs.iter().map(|&l| (2.0 * (l - top)).exp2()).sum();
    2.0 * top + s.log2()
}

// ---------------------------------------------------------------------------------------------
// The solver
// ---------------------------------------------------------------------------------------------

/// How `new` stores the factors; tests force one or the other on small matrices.
#[derive(Clone, Copy, Debug, PartialEq)]
#[cfg_attr(not(test), allow(dead_code))]
enum Layout {
    Auto,
    Dense,
    Sparse,
}

/// An integer-scaled matrix factored modulo a word-size prime, ready to lift any number of
/// right-hand sides of `A x = b` or `Aᵀ y = c` to their exact rational solutions.
pub struct PadicSolver {
    n: usize,
    modulus: Modulus,
    /// `s_i`: row `i` of `A` times `s_i` is row `i` of the integer matrix `A'`.
    scale: Vec<BigInt>,
    matrix: IntMatrix,
    factors: Factors,
    /// `log2 ‖row_i(A')‖²` and `log2 ‖col_j(A')‖²`, for the determinant bound that caps lifting.
    row_log_norm2: Vec<f64>,
    col_log_norm2: Vec<f64>,
}

impl std::fmt::Debug for PadicSolver {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("PadicSolver")
            .field("n", &self.n)
            .field("p", &self.modulus.p)
            .field("dense", &matches!(self.factors, Factors::Dense(_)))
            .field(
                "wide_entries",
                &matches!(self.matrix, IntMatrix::Big { .. }),
            )
            .finish()
    }
}

/// The right-hand side beyond its first balanced base-p digit, added to the residual one digit
/// per step so that the residual stays as small as the matrix entries from the start.
enum RhsTail {
    None,
    /// Digits `c^(t)`, `t >= 1` (entry `t - 1`), of a wide integer vector.
    Digits(Vec<Vec<i64>>),
    /// `δ · c` for a word-size vector `c` and a scalar `δ` with balanced digits `δ_t`: digit `t`
    /// is `δ_t c` (below 2^124, within the residual's headroom).
    Scaled {
        delta: Vec<i64>,
        c: Vec<i64>,
    },
}

/// Lifting state of one right-hand side.
struct Lifting {
    /// Integer right-hand side `c` of `A' z = c` (or `A'ᵀ z = c`); the rational one is `c / e`.
    c: Vec<BigInt>,
    e: BigInt,
    tail: RhsTail,
    res_small: Vec<i128>,
    res_big: Vec<BigInt>,
    /// Digit `t` of entry `j` at `xs[t * n + j]`.
    xs: Vec<u64>,
    /// `Σ_j w_j x_j` for each digit: the p-adic expansion of the random combination.
    comb: Vec<u128>,
    k: usize,
    next_check: usize,
    k_max: usize,
}

/// The main expansion and its modulus, for entries that the common denominator misses.
struct MainDigits<'a> {
    lift: &'a Lifting,
    big_p: BigUint,
    /// `p^k / 2^(SLACK+1)` and its square root, the reconstruction bounds.
    half: BigUint,
    bound: BigUint,
}

/// A verified solution `nums / den` of the integer system (before `e` and the row scales).
struct Recovered {
    nums: Vec<BigInt>,
    den: BigUint,
}

/// The current common denominator `d` and what the per-entry test needs: with
/// `nacc = floor(p^k / (2^(SLACK+1) d))`, entry `j` is `y / d` when the symmetric residue `y` of
/// `d · X_j` modulo the shorter `pp = p^kp > 2^(SLACK+1) · nacc` satisfies `|y| <= nacc`.
struct EntryTest {
    nacc: BigUint,
    kp: usize,
    pp: BigUint,
    half_pp: BigUint,
    dp: BigUint,
    bar: Barrett,
}

impl EntryTest {
    fn new(d: &BigUint, half: &BigUint, k: usize, pows: &mut Powers) -> EntryTest {
        let nacc = half / d;
        let need = nacc.bits() + SLACK_BITS + 2;
        let kp = (need.div_ceil(PRIME_BITS_FLOOR) as usize).clamp(1, k);
        let pp = pows.pow(kp);
        let dp = d % &pp;
        let half_pp = &pp >> 1u32;
        let bar = Barrett::new(pp.clone());
        EntryTest {
            nacc,
            kp,
            pp,
            half_pp,
            dp,
            bar,
        }
    }
}

impl PadicSolver {
    /// Scales `rows` (the `n × n` matrix `A`, `n = rows.len()`) to integers and factors it modulo
    /// a prime, trying up to three primes when one divides a pivot.
    ///
    /// Dense matrices (more than a fifth of the entries nonzero, or `n <= 32`) use row pivoting
    /// modulo `p`, so any nonsingular `A` works. Sparse ones use diagonal pivots in a fill-reducing
    /// symmetric order, which needs every principal minor nonzero — true for `I - Q` of an
    /// absorbing chain (a nonsingular M-matrix); otherwise the result may be `UnluckyPrimes`.
    pub fn new(rows: &[SparseRow], interrupted: &dyn Fn() -> bool) -> Result<Self, PadicError> {
        Self::with_layout(rows, interrupted, Layout::Auto)
    }

    fn with_layout(
        rows: &[SparseRow],
        interrupted: &dyn Fn() -> bool,
        layout: Layout,
    ) -> Result<Self, PadicError> {
        let n = rows.len();
        let (scale, matrix, row_log_norm2, col_log_norm2) = scale_to_integers(rows, interrupted)?;
        let (ptr, idx) = match &matrix {
            IntMatrix::Small { rows, .. } => (rows.ptr.clone(), rows.idx.clone()),
            IntMatrix::Big { rows, .. } => (rows.ptr.clone(), rows.idx.clone()),
        };
        let nnz = idx.len();
        let dense = match layout {
            Layout::Dense => true,
            Layout::Sparse => false,
            Layout::Auto => n <= DENSE_ALWAYS || nnz as f64 > DENSE_FILL * (n as f64) * (n as f64),
        };
        let matrix = match matrix {
            IntMatrix::Small { rows, cols, .. } => {
                // Contiguous copies for the residual products of the dense path.
                let dense_int = dense.then(|| {
                    let mut a = vec![0i64; n * n];
                    let mut at = vec![0i64; n * n];
                    for i in 0..n {
                        let (idx, vals) = rows.row(i);
                        for (&j, &v) in idx.iter().zip(vals) {
                            a[i * n + j] = v;
                            at[j * n + i] = v;
                        }
                    }
                    (a, at)
                });
                IntMatrix::Small {
                    rows,
                    cols,
                    dense: dense_int,
                }
            }
            big => big,
        };
        let big = Csr {
            ptr,
            idx,
            val: Vec::<u64>::new(),
        };

        let mut order: Option<Vec<usize>> = None;
        for p in lifting_primes().take(MAX_PRIMES) {
            let m = Modulus::new(p);
            let modp = Csr {
                ptr: big.ptr.clone(),
                idx: big.idx.clone(),
                val: match &matrix {
                    IntMatrix::Small { rows, .. } => {
                        rows.val.iter().map(|&v| m.reduce_i64(v)).collect()
                    }
                    IntMatrix::Big { rows, .. } => {
                        rows.val.iter().map(|v| m.reduce_big(v)).collect()
                    }
                },
            };
            let factors = if dense {
                let mut a = vec![0u64; n * n];
                for i in 0..n {
                    let (idx, vals) = modp.row(i);
                    for (&j, &v) in idx.iter().zip(vals) {
                        a[i * n + j] = v;
                    }
                }
                DenseLu::factor(n, a, &m, interrupted)?.map(Factors::Dense)
            } else {
                let ord = order
                    .get_or_insert_with(|| fill_reducing_order(n, &modp))
                    .clone();
                SparseLu::factor(n, &modp, ord, &m, interrupted)?.map(Factors::Sparse)
            };
            if let Some(factors) = factors {
                return Ok(PadicSolver {
                    n,
                    modulus: m,
                    scale,
                    matrix,
                    factors,
                    row_log_norm2,
                    col_log_norm2,
                });
            }
        }
        Err(PadicError::UnluckyPrimes)
    }

    /// The exact solutions of `A x = b` for each `b` in `rhs` (each of length `n`, else this
    /// panics), in lowest terms. Right-hand sides are solved one after the other; each after the
    /// first starts from the previous common denominator.
    pub fn solve_many(
        &self,
        rhs: &[Vec<BigRational>],
        interrupted: &dyn Fn() -> bool,
    ) -> Result<Vec<Vec<BigRational>>, PadicError> {
        self.solve_impl(rhs, false, interrupted)
    }

    /// The exact solutions of `Aᵀ y = c` for each `c` in `rhs` (each of length `n`, else this
    /// panics), in lowest terms, from the same factors.
    pub fn solve_transposed_many(
        &self,
        rhs: &[Vec<BigRational>],
        interrupted: &dyn Fn() -> bool,
    ) -> Result<Vec<Vec<BigRational>>, PadicError> {
        self.solve_impl(rhs, true, interrupted)
    }

    fn solve_impl(
        &self,
        rhs: &[Vec<BigRational>],
        transposed: bool,
        interrupted: &dyn Fn() -> bool,
    ) -> Result<Vec<Vec<BigRational>>, PadicError> {
        let n = self.n;
        for b in rhs {
            assert_eq!(
                b.len(),
                n,
                "right-hand side length differs from the matrix order"
            );
        }
        if n == 0 {
            return Ok(vec![Vec::new(); rhs.len()]);
        }
        let p = self.modulus.p;
        // Fixed seed: results and timings are reproducible; the weights only need to avoid
        // cancelling a denominator, which no input can aim at without knowing them.
        let mut seed: u64 = 0x9E37_79B9_7F4A_7C15;
        let weights: Vec<u64> = (0..n)
            .map(|_| {
                seed ^= seed << 13;
                seed ^= seed >> 7;
                seed ^= seed << 17;
                (seed >> (64 - WEIGHT_BITS)) | 1
            })
            .collect();

        let mut pows = Powers::new(p);
        // The denominator and numerator size of the previous answer: right-hand sides of one
        // chain usually share the denominator, and then no long lifting is needed at all.
        let mut hint: Option<(BigUint, u64)> = None;
        let mut results = Vec::with_capacity(rhs.len());
        // One right-hand side at a time keeps only one expansion in memory.
        for b in rhs {
            if interrupted() {
                return Err(PadicError::Interrupted);
            }
            let mut lift = self.start_lifting(b, transposed);
            let mut found = None;
            if let Some((d, zbits)) = &hint {
                found = self.recover(
                    &lift.c,
                    d.clone(),
                    *zbits,
                    None,
                    &mut pows,
                    transposed,
                    interrupted,
                )?;
            }
            while found.is_none() {
                if interrupted() {
                    return Err(PadicError::Interrupted);
                }
                self.step(&mut lift, Some(&weights), transposed);
                if lift.k >= lift.next_check || lift.k >= lift.k_max {
                    found = self.attempt(&lift, &mut pows, transposed, interrupted)?;
                    if found.is_none() {
                        if lift.k >= lift.k_max {
                            return Err(PadicError::UnluckyPrimes);
                        }
                        lift.next_check = lift.k + (lift.k / 8).max(1);
                    }
                }
            }
            let Recovered { nums, den } = found.expect("solved");
            let num_bits = nums.iter().map(|v| v.bits()).max().unwrap_or(0);
            hint = Some((den.clone(), num_bits + 64));
            let e = std::mem::take(&mut lift.e);
            drop(lift);
            results.push(self.finish(&e, nums, den, transposed, interrupted)?);
        }
        Ok(results)
    }

    /// Clears denominators of `b` (after the row scaling for `A x = b`), splits a wide right-hand
    /// side into base-p digits and computes the digit cap from the Hadamard bound.
    fn start_lifting(&self, b: &[BigRational], transposed: bool) -> Lifting {
        let n = self.n;
        let scaled: Vec<BigRational> = if transposed {
            b.to_vec()
        } else {
            b.iter()
                .zip(&self.scale)
                .map(|(v, s)| scale_rational(v, s))
                .collect()
        };
        let mut e = BigInt::one();
        for v in &scaled {
            e = lcm_with(e, v.denom());
        }
        let c: Vec<BigInt> = scaled
            .iter()
            .map(|v| {
                if v.denom() == &e {
                    v.numer().clone()
                } else {
                    v.numer() * (&e / v.denom())
                }
            })
            .collect();

        // Hadamard: |det A'| <= Π ‖row‖ and <= Π ‖col‖; a Cramer numerator replaces one column by
        // c, so each row of it has norm² at most ‖row‖² + c_i².
        let (rlog, clog) = if transposed {
            (&self.col_log_norm2, &self.row_log_norm2)
        } else {
            (&self.row_log_norm2, &self.col_log_norm2)
        };
        let det_bits = 0.5 * rlog.iter().sum::<f64>().min(clog.iter().sum::<f64>());
        let num_bits: f64 = 0.5
            * rlog
                .iter()
                .zip(&c)
                .map(|(&r, ci)| {
                    if ci.is_zero() {
                        r
                    } else {
                        let l = log2_big(ci);
                        log2_norm2(&[0.5 * r, l])
                    }
                })
                .sum::<f64>();
        let comb_bits = num_bits + (n as f64).log2() + WEIGHT_BITS as f64;
        let need = 2.0 * comb_bits.max(det_bits) + (SLACK_BITS + 8) as f64;
        let k_max = (need / PRIME_BITS_FLOOR as f64).ceil() as usize + 2;

        let (res_small, res_big, tail) = self.initial_residual(&c, None);
        Lifting {
            c,
            e,
            tail,
            res_small,
            res_big,
            xs: Vec::new(),
            comb: Vec::new(),
            k: 0,
            next_check: 1,
            k_max,
        }
    }

    /// The first residual and the digits still to come for the right-hand side `δ · c`
    /// (`δ = 1` when `None`).
    fn initial_residual(
        &self,
        c: &[BigInt],
        delta: Option<&BigUint>,
    ) -> (Vec<i128>, Vec<BigInt>, RhsTail) {
        let p = self.modulus.p;
        if let IntMatrix::Big { .. } = self.matrix {
            // Big residuals shrink by p per step on their own.
            let res = match delta {
                None => c.to_vec(),
                Some(d) => {
                    let d = BigInt::from(d.clone());
                    c.iter().map(|v| v * &d).collect()
                }
            };
            return (Vec::new(), res, RhsTail::None);
        }
        // |δ_t c_i| < 2^61 · 2^63 leaves the residual below 2^126 (see SMALL_SUM_LIMIT).
        let word = c.iter().all(|v| v.bits() < 64);
        match delta {
            None if c.iter().all(|v| v.bits() < SMALL_RHS_BITS) => (
                c.iter().map(|v| v.to_i128().expect("narrow")).collect(),
                Vec::new(),
                RhsTail::None,
            ),
            Some(d) if word => {
                let delta = balanced_digits(&BigInt::from(d.clone()), p);
                let c: Vec<i64> = c.iter().map(|v| v.to_i64().expect("one word")).collect();
                let res = c.iter().map(|&v| v as i128 * delta[0] as i128).collect();
                (res, Vec::new(), RhsTail::Scaled { delta, c })
            }
            _ => {
                let d = delta.map(|d| BigInt::from(d.clone()));
                let digits: Vec<Vec<i64>> = c
                    .iter()
                    .map(|v| match &d {
                        Some(d) => balanced_digits(&(v * d), p),
                        None => balanced_digits(v, p),
                    })
                    .collect();
                let len = digits.iter().map(Vec::len).max().unwrap_or(1);
                // Digit-major, as the steps consume them.
                let mut by_step: Vec<Vec<i64>> = (0..len)
                    .map(|t| {
                        digits
                            .iter()
                            .map(|dv| dv.get(t).copied().unwrap_or(0))
                            .collect()
                    })
                    .collect();
                let first = by_step.remove(0);
                (
                    first.into_iter().map(|v| v as i128).collect(),
                    Vec::new(),
                    RhsTail::Digits(by_step),
                )
            }
        }
    }

    /// One lifting step: the next digit `x = A'⁻¹ r mod p` and `r ← (r − A' x) / p`.
    fn step(&self, lift: &mut Lifting, weights: Option<&[u64]>, transposed: bool) {
        let n = self.n;
        let m = &self.modulus;
        let rm: Vec<u64> = match self.matrix {
            IntMatrix::Small { .. } => lift.res_small.iter().map(|&v| m.reduce_i128(v)).collect(),
            IntMatrix::Big { .. } => lift.res_big.iter().map(|v| m.reduce_big(v)).collect(),
        };
        let x = self.factors.solve(m, &rm, transposed);
        if let Some(w) = weights {
            lift.comb.push(
                x.iter()
                    .zip(w)
                    .map(|(&xj, &w)| xj as u128 * w as u128)
                    .sum(),
            );
        }
        match &self.matrix {
            IntMatrix::Small { rows, cols, dense } => {
                let r = &mut lift.res_small;
                if let Some((a, at)) = dense {
                    let a = if transposed { at } else { a };
                    for (i, ri) in r.iter_mut().enumerate() {
                        let row = &a[i * n..(i + 1) * n];
                        let mut acc: i128 = 0;
                        for (&aij, &xj) in row.iter().zip(&x) {
                            acc += aij as i128 * xj as i64 as i128;
                        }
                        let v = *ri - acc;
                        debug_assert_eq!(v.rem_euclid(m.p as i128), 0);
                        *ri = m.exact_div(v);
                    }
                } else {
                    let csr = if transposed { cols } else { rows };
                    for (i, ri) in r.iter_mut().enumerate() {
                        let (idx, vals) = csr.row(i);
                        let mut acc: i128 = 0;
                        for (&j, &aij) in idx.iter().zip(vals) {
                            acc += aij as i128 * x[j] as i64 as i128;
                        }
                        let v = *ri - acc;
                        debug_assert_eq!(v.rem_euclid(m.p as i128), 0);
                        *ri = m.exact_div(v);
                    }
                }
                match &lift.tail {
                    RhsTail::None => {}
                    RhsTail::Digits(digits) => {
                        if let Some(dig) = digits.get(lift.k) {
                            for (ri, &d) in r.iter_mut().zip(dig) {
                                *ri += d as i128;
                            }
                        }
                    }
                    RhsTail::Scaled { delta, c } => {
                        if let Some(&dt) = delta.get(lift.k + 1) {
                            for (ri, &cv) in r.iter_mut().zip(c) {
                                *ri += dt as i128 * cv as i128;
                            }
                        }
                    }
                }
            }
            IntMatrix::Big { rows, cols } => {
                let csr = if transposed { cols } else { rows };
                let pb = BigInt::from(m.p);
                for (i, ri) in lift.res_big.iter_mut().enumerate() {
                    let (idx, vals) = csr.row(i);
                    let mut acc = ri.clone();
                    for (&j, aij) in idx.iter().zip(vals) {
                        if x[j] != 0 {
                            acc -= aij * x[j];
                        }
                    }
                    debug_assert!(acc.mod_floor(&pb).is_zero());
                    *ri = acc / &pb;
                }
            }
        }
        lift.xs.extend_from_slice(&x);
        lift.k += 1;
    }

    /// Tries to turn the first `k` digits into the exact solution: the random combination is
    /// reconstructed first, and its denominator `d` is, with high probability, the common
    /// denominator of all entries; `recover` does the rest. `None` if more digits are needed.
    fn attempt(
        &self,
        lift: &Lifting,
        pows: &mut Powers,
        transposed: bool,
        interrupted: &dyn Fn() -> bool,
    ) -> Result<Option<Recovered>, PadicError> {
        let k = lift.k;
        let p = self.modulus.p;
        let big_p = pows.pow(k);
        pows.prepare(k);
        let s = pows.build(&lift.comb[..k]) % &big_p;
        let half = &big_p >> (SLACK_BITS + 1);
        let bound = half.sqrt();
        let Some((cnum, d0)) = rational_reconstruction(&s, &big_p, &bound, &bound, p) else {
            return Ok(None);
        };
        let nacc0 = &half / &d0;
        if nacc0.is_zero() {
            return Ok(None);
        }
        // Entries are not expected to exceed the combination's numerator (random positive
        // weights rarely cancel); 64 bits of margin, capped by the uniqueness bound.
        let zbits = (cnum.bits() + 64).min(nacc0.bits());
        let main = MainDigits {
            lift,
            big_p,
            half,
            bound,
        };
        self.recover(
            &lift.c,
            d0,
            zbits,
            Some(main),
            pows,
            transposed,
            interrupted,
        )
    }

    /// With `d0` a candidate common denominator, `z = d0 · A'⁻¹ c` is an integer vector. Rather
    /// than multiplying every p-adic expansion by `d0` modulo `p^k`, `z` is lifted directly
    /// (right-hand side `d0 c`, cheap steps) for just enough digits to hold `zbits`-bit entries,
    /// and each entry needs only a base conversion. An entry that does not fit is reconstructed on
    /// its own from the `main` digits, and the common denominator grows (without `main`, the
    /// candidate is simply rejected). Finally `A' z = d c` is verified exactly.
    #[allow(clippy::too_many_arguments)]
    fn recover(
        &self,
        c: &[BigInt],
        d0: BigUint,
        zbits: u64,
        main: Option<MainDigits<'_>>,
        pows: &mut Powers,
        transposed: bool,
        interrupted: &dyn Fn() -> bool,
    ) -> Result<Option<Recovered>, PadicError> {
        let n = self.n;
        let p = self.modulus.p;
        let kz = ((zbits + SLACK_BITS + 2).div_ceil(PRIME_BITS_FLOOR) as usize).max(1);
        let mut z = self.scaled_lifting(c, &d0);
        for _ in 0..kz {
            if interrupted() {
                return Err(PadicError::Interrupted);
            }
            self.step(&mut z, None, transposed);
        }
        let pz = pows.pow(kz);
        pows.prepare(kz);
        let half_pz = &pz >> 1u32;
        let zlimit = BigUint::one() << zbits;

        // Entries in blocks whose digits are first gathered contiguously (the lifting stores
        // them digit-major).
        const BLOCK: usize = 64;
        let mut d = d0;
        let mut versions: Vec<BigUint> = vec![d.clone()];
        let mut test: Option<EntryTest> = None;
        let mut nums: Vec<(BigInt, usize)> = Vec::with_capacity(n);
        let mut tmp: Vec<u64> = Vec::new();
        for j in (0..n).step_by(BLOCK) {
            if interrupted() {
                return Err(PadicError::Interrupted);
            }
            let end = (j + BLOCK).min(n);
            tmp.clear();
            tmp.resize((end - j) * kz, 0);
            for t in 0..kz {
                for (jj, &v) in z.xs[t * n + j..t * n + end].iter().enumerate() {
                    tmp[jj * kz + t] = v;
                }
            }
            for jj in j..end {
                let v = pows.build(&tmp[(jj - j) * kz..(jj - j + 1) * kz]);
                let (sign, mag) = if v > half_pz {
                    (Sign::Minus, &pz - v)
                } else {
                    (Sign::Plus, v)
                };
                if mag < zlimit {
                    nums.push((BigInt::from_biguint(sign, mag), 0));
                    continue;
                }
                // This entry's denominator does not divide d0 (or its numerator is unusually
                // large).
                let Some(main) = &main else { return Ok(None) };
                if interrupted() {
                    return Err(PadicError::Interrupted);
                }
                let (k, xs) = (main.lift.k, &main.lift.xs);
                let full: Vec<u64> = (0..k).map(|t| xs[t * n + jj]).collect();
                if versions.len() > 1 {
                    // d has grown already: it may cover this entry too.
                    let te = test.get_or_insert_with(|| EntryTest::new(&d, &main.half, k, pows));
                    pows.prepare(te.kp);
                    let y = te.bar.reduce(&(&te.dp * pows.build(&full[..te.kp])));
                    let (sign, mag) = if y > te.half_pp {
                        (Sign::Minus, &te.pp - y)
                    } else {
                        (Sign::Plus, y)
                    };
                    if mag <= te.nacc {
                        nums.push((BigInt::from_biguint(sign, mag), versions.len() - 1));
                        continue;
                    }
                }
                // Reconstruct d · X_j on its own: its denominator f is what d lacks.
                let zf = (&d * pows.build(&full)) % &main.big_p;
                let Some((e, f)) =
                    rational_reconstruction(&zf, &main.big_p, &main.bound, &main.bound, p)
                else {
                    return Ok(None);
                };
                d *= f;
                versions.push(d.clone());
                test = None;
                nums.push((e, versions.len() - 1));
            }
        }
        let last = versions.len() - 1;
        let factors: Vec<BigInt> = versions
            .iter()
            .map(|v| BigInt::from(&versions[last] / v))
            .collect();
        let nums: Vec<BigInt> = nums
            .into_iter()
            .map(|(x, v)| if v == last { x } else { x * &factors[v] })
            .collect();
        if !self.verify(&nums, &d, c, transposed, interrupted)? {
            return Ok(None);
        }
        Ok(Some(Recovered { nums, den: d }))
    }

    /// A lifting of `A' z = δ c` from the start, for `δ` the candidate common denominator.
    fn scaled_lifting(&self, c: &[BigInt], delta: &BigUint) -> Lifting {
        let (res_small, res_big, tail) = self.initial_residual(c, Some(delta));
        Lifting {
            c: Vec::new(),
            e: BigInt::one(),
            tail,
            res_small,
            res_big,
            xs: Vec::new(),
            comb: Vec::new(),
            k: 0,
            next_check: 0,
            k_max: 0,
        }
    }

    /// Exact check of `A' z = d c` (or `A'ᵀ z = d c`) for the candidate numerators `z`.
    fn verify(
        &self,
        nums: &[BigInt],
        d: &BigUint,
        c: &[BigInt],
        transposed: bool,
        interrupted: &dyn Fn() -> bool,
    ) -> Result<bool, PadicError> {
        debug_assert_eq!(c.len(), self.n);
        match &self.matrix {
            IntMatrix::Small { rows, cols, .. } => {
                let csr = if transposed { cols } else { rows };
                let limbs: Vec<(bool, Vec<u64>)> = nums
                    .iter()
                    .map(|x| (x.is_negative(), x.magnitude().to_u64_digits()))
                    .collect();
                let mut pos: Vec<u64> = Vec::new();
                let mut neg: Vec<u64> = Vec::new();
                for (i, ci) in c.iter().enumerate() {
                    if i % 64 == 0 && interrupted() {
                        return Err(PadicError::Interrupted);
                    }
                    pos.clear();
                    neg.clear();
                    let (idx, vals) = csr.row(i);
                    for (&j, &a) in idx.iter().zip(vals) {
                        let (xneg, ref xl) = limbs[j];
                        if a == 0 || xl.is_empty() {
                            continue;
                        }
                        let target = if (a < 0) ^ xneg { &mut neg } else { &mut pos };
                        mac_limbs(target, xl, a.unsigned_abs());
                    }
                    if !ci.is_zero() {
                        let t = (d * ci.magnitude()).to_u64_digits();
                        // Σ a z − d c = 0: move d c to the side of the opposite sign.
                        let target = if ci.is_negative() { &mut pos } else { &mut neg };
                        mac_limbs(target, &t, 1);
                    }
                    trim(&mut pos);
                    trim(&mut neg);
                    if pos != neg {
                        return Ok(false);
                    }
                }
                Ok(true)
            }
            IntMatrix::Big { rows, cols } => {
                let csr = if transposed { cols } else { rows };
                let dd = BigInt::from(d.clone());
                for (i, ci) in c.iter().enumerate() {
                    if i % 64 == 0 && interrupted() {
                        return Err(PadicError::Interrupted);
                    }
                    let (idx, vals) = csr.row(i);
                    let mut acc = -(&dd * ci);
                    for (&j, a) in idx.iter().zip(vals) {
                        acc += a * &nums[j];
                    }
                    if !acc.is_zero() {
                        return Ok(false);
                    }
                }
                Ok(true)
            }
        }
    }

    /// From `z = nums / d` to the answer: `x = z / e`, or `y = S z / e` for the transposed
    /// system (`Aᵀ = A'ᵀ S⁻¹`), in lowest terms.
    fn finish(
        &self,
        e: &BigInt,
        nums: Vec<BigInt>,
        d: BigUint,
        transposed: bool,
        interrupted: &dyn Fn() -> bool,
    ) -> Result<Vec<BigRational>, PadicError> {
        let den = d * e.magnitude();
        let nums = if transposed {
            nums.into_iter()
                .zip(&self.scale)
                .map(|(x, s)| x * s)
                .collect()
        } else {
            nums
        };
        reduce_all(nums, den, interrupted)
    }
}

/// Row `i` of `A` times the lcm `s_i` of its denominators, in machine words if everything fits.
fn scale_row_small(row: &SparseRow) -> Option<(i64, Vec<(usize, i64)>)> {
    let mut s: u64 = 1;
    let mut last: u64 = 1;
    for (_, v) in row {
        let d = v.denom().to_u64()?;
        // Rows of a chain usually share one denominator: skip the gcd then.
        if d == last || s.is_multiple_of(d) {
            continue;
        }
        last = d;
        s = (s / s.gcd(&d)).checked_mul(d)?;
        if s >= 1 << 62 {
            return None;
        }
    }
    let mut out = Vec::with_capacity(row.len());
    for (j, v) in row {
        if v.is_zero() {
            continue;
        }
        let num = v.numer().to_i64()? as i128;
        let d = v.denom().to_u64()?;
        out.push((*j, i64::try_from(num * (s / d) as i128).ok()?));
    }
    Some((s as i64, out))
}

/// The same in big integers.
fn scale_row_big(row: &SparseRow) -> (BigInt, Vec<(usize, BigInt)>) {
    let mut s = BigInt::one();
    for (_, v) in row {
        if !v.denom().is_one() && !(&s % v.denom()).is_zero() {
            s = s.lcm(v.denom());
        }
    }
    let out = row
        .iter()
        .filter(|(_, v)| !v.is_zero())
        .map(|(j, v)| (*j, v.numer() * (&s / v.denom())))
        .collect();
    (s, out)
}

/// Scales `A` to the integer matrix `A'` and measures its row and column norms (as
/// `log2 ‖·‖²`) for the determinant bound.
#[allow(clippy::type_complexity)]
fn scale_to_integers(
    rows: &[SparseRow],
    interrupted: &dyn Fn() -> bool,
) -> Result<(Vec<BigInt>, IntMatrix, Vec<f64>, Vec<f64>), PadicError> {
    let n = rows.len();
    let mut small: Option<(Vec<BigInt>, Csr<i64>)> = Some((
        Vec::with_capacity(n),
        Csr {
            ptr: vec![0],
            idx: Vec::new(),
            val: Vec::new(),
        },
    ));
    for (i, row) in rows.iter().enumerate() {
        if i % 256 == 0 && interrupted() {
            return Err(PadicError::Interrupted);
        }
        let Some((scale, csr)) = small.as_mut() else {
            break;
        };
        match scale_row_small(row) {
            Some((s, entries)) => {
                let mut sum: u128 = 0;
                for (j, v) in entries {
                    debug_assert!(j < n);
                    sum += v.unsigned_abs() as u128;
                    csr.idx.push(j);
                    csr.val.push(v);
                }
                csr.ptr.push(csr.idx.len());
                scale.push(BigInt::from(s));
                if sum >= SMALL_SUM_LIMIT {
                    small = None;
                }
            }
            None => small = None,
        }
    }
    if let Some((scale, rows_s)) = small {
        let cols_s = rows_s.transpose(n);
        let col_sums_fit = (0..n).all(|j| {
            cols_s
                .row(j)
                .1
                .iter()
                .map(|v| v.unsigned_abs() as u128)
                .sum::<u128>()
                < SMALL_SUM_LIMIT
        });
        if col_sums_fit {
            let logs = |csr: &Csr<i64>| -> Vec<f64> {
                (0..n)
                    .map(|i| {
                        csr.row(i)
                            .1
                            .iter()
                            .map(|&v| (v as f64) * (v as f64))
                            .sum::<f64>()
                            .log2()
                    })
                    .collect()
            };
            let (rl, cl) = (logs(&rows_s), logs(&cols_s));
            return Ok((
                scale,
                IntMatrix::Small {
                    rows: rows_s,
                    cols: cols_s,
                    dense: None,
                },
                rl,
                cl,
            ));
        }
    }
    let mut scale = Vec::with_capacity(n);
    let mut big = Csr {
        ptr: vec![0],
        idx: Vec::new(),
        val: Vec::new(),
    };
    for (i, row) in rows.iter().enumerate() {
        if i % 64 == 0 && interrupted() {
            return Err(PadicError::Interrupted);
        }
        let (s, entries) = scale_row_big(row);
        for (j, v) in entries {
            big.idx.push(j);
            big.val.push(v);
        }
        big.ptr.push(big.idx.len());
        scale.push(s);
    }
    let big_t = big.transpose(n);
    let logs = |csr: &Csr<BigInt>| -> Vec<f64> {
        (0..n)
            .map(|i| {
                let l: Vec<f64> = csr.row(i).1.iter().map(log2_big).collect();
                log2_norm2(&l)
            })
            .collect()
    };
    let (rl, cl) = (logs(&big), logs(&big_t));
    Ok((
        scale,
        IntMatrix::Big {
            rows: big,
            cols: big_t,
        },
        rl,
        cl,
    ))
}

/// Balanced base-p digits of `v`: `v = Σ v_t p^t` with `|v_t| <= p / 2`; at least one digit.
fn balanced_digits(v: &BigInt, p: u64) -> Vec<i64> {
    // Divides the magnitude's words by p in place (one 128-bit division per word), with no
    // big-number allocation per digit; digits of -v are those of v negated, p being odd.
    let mut words = v.magnitude().to_u64_digits();
    let mut out = Vec::new();
    let mut carry = false;
    loop {
        if carry {
            let mut k = 0;
            loop {
                if k == words.len() {
                    words.push(1);
                    break;
                }
                let (sum, over) = words[k].overflowing_add(1);
                words[k] = sum;
                if !over {
                    break;
                }
                k += 1;
            }
        }
        while words.last() == Some(&0) {
            words.pop();
        }
        if words.is_empty() {
            break;
        }
        let mut remainder: u128 = 0;
        for word in words.iter_mut().rev() {
            let current = (remainder << 64) | u128::from(*word);
            *word = (current / u128::from(p)) as u64;
            remainder = current % u128::from(p);
        }
        let d = remainder as u64;
        carry = d > p / 2;
        out.push(if carry { -((p - d) as i64) } else { d as i64 });
    }
    if out.is_empty() {
        out.push(0);
    }
    if v.sign() == Sign::Minus {
        for digit in &mut out {
            *digit = -*digit;
        }
    }
    out
}

#[cfg(test)]
fn balanced_digits_reference(v: &BigInt, p: u64) -> Vec<i64> {
    let pb = BigInt::from(p);
    let mut rest = v.clone();
    let mut out = Vec::new();
    while !rest.is_zero() || out.is_empty() {
        let d = rest.mod_floor(&pb).to_u64().expect("residue");
        let signed = if d > p / 2 {
            -((p - d) as i64)
        } else {
            d as i64
        };
        rest = (rest - signed) / &pb;
        out.push(signed);
    }
    out
}

/// `nums[j] / den` in lowest terms. Rather than one gcd per entry, `g = gcd(den, Π nums mod den)`
/// is computed once: every `gcd(nums[j], den)` divides `g`, so when `g = 1` (the usual case) all
/// fractions are already reduced, and otherwise each entry needs a gcd with the smaller `g`.
fn reduce_all(
    nums: Vec<BigInt>,
    den: BigUint,
    interrupted: &dyn Fn() -> bool,
) -> Result<Vec<BigRational>, PadicError> {
    if den.is_one() {
        return Ok(nums.into_iter().map(BigRational::from_integer).collect());
    }
    let g = if den.bits() <= 256 {
        den.clone()
    } else {
        let bar = Barrett::new(den.clone());
        let mut acc = BigUint::one();
        for (j, x) in nums.iter().enumerate() {
            if j % 64 == 0 && interrupted() {
                return Err(PadicError::Interrupted);
            }
            if x.is_zero() {
                continue;
            }
            let xm = x.magnitude();
            let prod = if xm < &den {
                acc * xm
            } else {
                acc * bar.reduce_any(xm)
            };
            acc = bar.reduce(&prod);
        }
        gcd_big(&acc, &den)
    };
    let deni = BigInt::from(den.clone());
    let mut out = Vec::with_capacity(nums.len());
    for (j, x) in nums.into_iter().enumerate() {
        if j % 64 == 0 && interrupted() {
            return Err(PadicError::Interrupted);
        }
        if x.is_zero() {
            out.push(BigRational::zero());
            continue;
        }
        if g.is_one() {
            out.push(BigRational::new_raw(x, deni.clone()));
            continue;
        }
        let gj = gcd_big(&(x.magnitude() % &g), &g);
        if gj.is_one() {
            out.push(BigRational::new_raw(x, deni.clone()));
        } else {
            let gi = BigInt::from(gj);
            out.push(BigRational::new_raw(x / &gi, &deni / &gi));
        }
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn q(n: i64, d: i64) -> BigRational {
        BigRational::new(BigInt::from(n), BigInt::from(d))
    }

    fn never() -> bool {
        false
    }

    /// Dense test family: weights `1 + (7i + 3j) % 5` to every transient state and two exits.
    fn dense_chain(n: usize) -> (Vec<SparseRow>, Vec<Vec<BigRational>>) {
        let mut rows = Vec::new();
        let mut b0 = Vec::new();
        let mut b1 = Vec::new();
        for i in 0..n {
            let w: Vec<i64> = (0..n).map(|j| 1 + ((i * 7 + j * 3) % 5) as i64).collect();
            let e0 = 1i64;
            let e1 = 1 + (i % 2) as i64;
            let total: i64 = w.iter().sum::<i64>() + e0 + e1;
            let row: SparseRow = (0..n)
                .map(|j| {
                    let qv = q(w[j], total);
                    let v = if i == j { BigRational::one() - qv } else { -qv };
                    (j, v)
                })
                .collect();
            rows.push(row);
            b0.push(q(e0, total));
            b1.push(q(e1, total));
        }
        (rows, vec![b0, b1])
    }

    /// Walk on 1..=n: up 2/5, down 1/2, stay 1/10; the right-hand side is the step to n + 1.
    fn walk(n: usize) -> (Vec<SparseRow>, Vec<BigRational>) {
        let mut rows = Vec::new();
        let mut b = Vec::new();
        for i in 0..n {
            let mut row = Vec::new();
            if i > 0 {
                row.push((i - 1, q(-1, 2)));
            }
            row.push((i, q(9, 10)));
            if i + 1 < n {
                row.push((i + 1, q(-2, 5)));
            }
            rows.push(row);
            b.push(if i + 1 == n {
                q(2, 5)
            } else {
                BigRational::zero()
            });
        }
        (rows, b)
    }

    struct XorShift(u64);
    impl XorShift {
        fn next(&mut self) -> u64 {
            self.0 ^= self.0 << 13;
            self.0 ^= self.0 >> 7;
            self.0 ^= self.0 << 17;
            self.0
        }
        fn below(&mut self, m: u64) -> u64 {
            self.next() % m
        }
    }

    /// Random `I - Q` with substochastic rows (some mass always leaves), mixed denominators.
    fn random_system(rng: &mut XorShift, n: usize, fill: u64) -> Vec<SparseRow> {
        let dens = [2i64, 3, 5, 7, 10, 13, 100, 1000];
        (0..n)
            .map(|i| {
                let mut entries: Vec<(usize, BigRational)> = Vec::new();
                let mut mass = BigRational::zero();
                for j in 0..n {
                    if j == i || rng.below(100) >= fill {
                        continue;
                    }
                    let d = dens[rng.below(dens.len() as u64) as usize];
                    let v = q(1 + rng.below(3) as i64, d * n as i64);
                    mass += &v;
                    entries.push((j, -v));
                }
                let stay = q(rng.below(3) as i64, 7 * n as i64);
                assert!(mass.clone() + stay.clone() < BigRational::one());
                entries.push((i, BigRational::one() - stay));
                entries.sort_by_key(|e| e.0);
                entries
            })
            .collect()
    }

    fn random_rhs(rng: &mut XorShift, n: usize) -> Vec<BigRational> {
        (0..n)
            .map(|_| {
                let num = rng.below(41) as i64 - 20;
                let den = 1 + rng.below(30) as i64;
                q(num, den)
            })
            .collect()
    }

    /// Plain Gauss–Jordan elimination over the rationals: the expected answers.
    fn gauss(rows: &[SparseRow], b: &[BigRational], transposed: bool) -> Vec<BigRational> {
        let n = rows.len();
        let mut a = vec![vec![BigRational::zero(); n + 1]; n];
        for (i, row) in rows.iter().enumerate() {
            for (j, v) in row {
                if transposed {
                    a[*j][i] = v.clone();
                } else {
                    a[i][*j] = v.clone();
                }
            }
        }
        for i in 0..n {
            a[i][n] = b[i].clone();
        }
        for k in 0..n {
            let piv = (k..n).find(|&i| !a[i][k].is_zero()).expect("nonsingular");
            a.swap(k, piv);
            let inv = a[k][k].recip();
            for v in a[k][k..].iter_mut() {
                *v = &*v * &inv;
            }
            let pivot_row = a[k].clone();
            for (i, row) in a.iter_mut().enumerate() {
                if i != k && !row[k].is_zero() {
                    let f = row[k].clone();
                    for (v, pv) in row[k..].iter_mut().zip(&pivot_row[k..]) {
                        *v -= &f * pv;
                    }
                }
            }
        }
        (0..n).map(|i| a[i][n].clone()).collect()
    }

    fn check_random(layout: Layout, seed: u64, cases: usize, max_n: u64, fill: u64) {
        let mut rng = XorShift(seed);
        for _ in 0..cases {
            let n = 1 + rng.below(max_n) as usize;
            let rows = random_system(&mut rng, n, fill);
            let solver = PadicSolver::with_layout(&rows, &never, layout).unwrap();
            let rhs: Vec<Vec<BigRational>> = (0..3).map(|_| random_rhs(&mut rng, n)).collect();
            let xs = solver.solve_many(&rhs, &never).unwrap();
            let ys = solver.solve_transposed_many(&rhs, &never).unwrap();
            for (b, (x, y)) in rhs.iter().zip(xs.iter().zip(&ys)) {
                assert_eq!(x, &gauss(&rows, b, false), "solve, n = {n}");
                assert_eq!(y, &gauss(&rows, b, true), "transposed, n = {n}");
                // Canonical form: the comparison above is by value, so check reduction too.
                for v in x.iter().chain(y) {
                    assert!(v.numer().gcd(v.denom()).is_one() && v.denom().is_positive());
                }
            }
        }
    }

    #[test]
    fn random_dense_systems_match_elimination() {
        check_random(Layout::Dense, 0x1234_5678, 25, 12, 60);
    }

    #[test]
    fn random_sparse_systems_match_elimination() {
        check_random(Layout::Sparse, 0x9876_5432, 25, 14, 25);
        check_random(Layout::Auto, 0x5555_aaaa, 10, 30, 10);
    }

    #[test]
    fn walk_matches_closed_form() {
        let n = 60;
        let (rows, b) = walk(n);
        let solver = PadicSolver::new(&rows, &never).unwrap();
        let x = solver.solve_many(&[b], &never).unwrap().remove(0);
        // P(reach n+1 before 0 | z) = (1 - r^z) / (1 - r^(n+1)), r = (1/2) / (2/5) = 5/4.
        let r = q(5, 4);
        let big_n = (n + 1) as i32;
        for z in 1..=n {
            let expect =
                (BigRational::one() - r.pow(z as i32)) / (BigRational::one() - r.pow(big_n));
            assert_eq!(x[z - 1], expect, "z = {z}");
        }
    }

    #[test]
    fn dense_family_matches_elimination() {
        let (rows, rhs) = dense_chain(15);
        let solver = PadicSolver::new(&rows, &never).unwrap();
        let xs = solver.solve_many(&rhs, &never).unwrap();
        let ys = solver.solve_transposed_many(&rhs, &never).unwrap();
        for (b, (x, y)) in rhs.iter().zip(xs.iter().zip(&ys)) {
            assert_eq!(x, &gauss(&rows, b, false));
            assert_eq!(y, &gauss(&rows, b, true));
        }
    }

    #[test]
    fn wide_entries_and_right_hand_sides() {
        // Denominators near 2^40 make the scaled entries exceed the small-integer path, and a
        // huge right-hand side exercises the digit split.
        let big1 = BigInt::from(1_099_511_627_791i64);
        let big2 = BigInt::from(1_099_511_627_803i64);
        let r = |n: i64, d: &BigInt| BigRational::new(BigInt::from(n), d.clone());
        let rows: Vec<SparseRow> = vec![
            vec![
                (0, BigRational::one() - r(1, &big1)),
                (1, -r(3, &big2)),
                (2, q(-1, 3)),
            ],
            vec![(0, q(-1, 4)), (1, q(1, 1)), (2, -r(7, &big1))],
            vec![
                (0, -r(5, &big2)),
                (1, q(-1, 9)),
                (2, BigRational::one() - r(2, &big1)),
            ],
        ];
        let huge = BigRational::new(BigInt::from(3).pow(400u32) + 1, BigInt::from(7).pow(50u32));
        let b = vec![huge.clone(), -huge, q(1, 3)];
        for layout in [Layout::Dense, Layout::Sparse] {
            let solver = PadicSolver::with_layout(&rows, &never, layout).unwrap();
            assert!(matches!(solver.matrix, IntMatrix::Big { .. }));
            let x = solver.solve_many(std::slice::from_ref(&b), &never).unwrap();
            assert_eq!(x[0], gauss(&rows, &b, false));
            let y = solver
                .solve_transposed_many(std::slice::from_ref(&b), &never)
                .unwrap();
            assert_eq!(y[0], gauss(&rows, &b, true));
        }
        // Small matrix, wide right-hand side.
        let (rows, _) = dense_chain(6);
        let b: Vec<BigRational> = (0..6)
            .map(|i| BigRational::new(BigInt::from(10).pow(60 + i) - 1, BigInt::from(3 + i)))
            .collect();
        for layout in [Layout::Dense, Layout::Sparse] {
            let solver = PadicSolver::with_layout(&rows, &never, layout).unwrap();
            let x = solver.solve_many(std::slice::from_ref(&b), &never).unwrap();
            assert_eq!(x[0], gauss(&rows, &b, false));
            let y = solver
                .solve_transposed_many(std::slice::from_ref(&b), &never)
                .unwrap();
            assert_eq!(y[0], gauss(&rows, &b, true));
        }
    }

    #[test]
    fn unlucky_primes_are_retried_then_reported() {
        let primes: Vec<u64> = lifting_primes().take(MAX_PRIMES).collect();
        // A = [p0 / (p0 + 1)] scales to [p0]: singular modulo the first prime only.
        let p0 = BigInt::from(primes[0]);
        let rows = vec![vec![(0, BigRational::new(p0.clone(), &p0 + 1))]];
        for layout in [Layout::Dense, Layout::Sparse] {
            let solver = PadicSolver::with_layout(&rows, &never, layout).unwrap();
            let x = solver.solve_many(&[vec![q(1, 1)]], &never).unwrap();
            assert_eq!(x[0][0], BigRational::new(&p0 + 1, p0.clone()));
        }
        let all: BigInt = primes.iter().map(|&p| BigInt::from(p)).product();
        let rows = vec![vec![(0, BigRational::new(all.clone(), &all + 1))]];
        for layout in [Layout::Dense, Layout::Sparse] {
            let err = PadicSolver::with_layout(&rows, &never, layout).err();
            assert_eq!(err, Some(PadicError::UnluckyPrimes));
        }
        // The second pivot, p0 / (p0 + 1) scaled by p0 + 1, vanishes modulo the first prime only
        // after elimination.
        let rows = vec![
            vec![(0, q(1, 1)), (1, q(-1, 2))],
            vec![
                (0, BigRational::new(BigInt::from(-2), &p0 + 1)),
                (1, q(1, 1)),
            ],
        ];
        let b = vec![q(1, 3), q(2, 5)];
        for layout in [Layout::Dense, Layout::Sparse] {
            let solver = PadicSolver::with_layout(&rows, &never, layout).unwrap();
            let x = solver.solve_many(std::slice::from_ref(&b), &never).unwrap();
            assert_eq!(x[0], gauss(&rows, &b, false));
        }
    }

    #[test]
    fn interruption_is_reported() {
        let (rows, rhs) = dense_chain(40);
        assert_eq!(
            PadicSolver::new(&rows, &|| true).err(),
            Some(PadicError::Interrupted)
        );
        let solver = PadicSolver::new(&rows, &never).unwrap();
        assert_eq!(
            solver.solve_many(&rhs, &|| true).err(),
            Some(PadicError::Interrupted)
        );
        assert_eq!(
            solver.solve_transposed_many(&rhs, &|| true).err(),
            Some(PadicError::Interrupted)
        );
        let (rows, b) = walk(300);
        let solver = PadicSolver::new(&rows, &never).unwrap();
        // Interrupt after a few polls, in the middle of the lifting.
        let calls = std::cell::Cell::new(0);
        let later = || {
            calls.set(calls.get() + 1);
            calls.get() > 20
        };
        assert_eq!(
            solver.solve_many(&[b], &later).err(),
            Some(PadicError::Interrupted)
        );
    }

    #[test]
    fn denominator_missed_by_the_combination() {
        // x = (1/2, 1/2, 0, 1/3): with odd weights the combination's 2 cancels, so the common
        // denominator must grow entry by entry.
        let rows: Vec<SparseRow> = (0..4).map(|i| vec![(i, q(2, 1))]).collect();
        let b = vec![q(1, 1), q(1, 1), q(0, 1), q(2, 3)];
        for layout in [Layout::Dense, Layout::Sparse] {
            let solver = PadicSolver::with_layout(&rows, &never, layout).unwrap();
            let x = solver.solve_many(std::slice::from_ref(&b), &never).unwrap();
            assert_eq!(x[0], vec![q(1, 2), q(1, 2), q(0, 1), q(1, 3)]);
        }
    }

    #[test]
    fn denominator_of_an_earlier_right_hand_side_is_only_a_hint() {
        // The first answer is integral; the second needs the denominator 2 (and the third is
        // integral again): the shared-denominator shortcut must reject, then recover.
        let rows: Vec<SparseRow> = (0..3).map(|i| vec![(i, q(2, 1))]).collect();
        let rhs = vec![
            vec![q(2, 1), q(4, 1), q(6, 1)],
            vec![q(1, 1), q(0, 1), q(3, 1)],
            vec![q(8, 1), q(2, 1), q(0, 1)],
        ];
        for layout in [Layout::Dense, Layout::Sparse] {
            let solver = PadicSolver::with_layout(&rows, &never, layout).unwrap();
            let x = solver.solve_many(&rhs, &never).unwrap();
            assert_eq!(x[0], vec![q(1, 1), q(2, 1), q(3, 1)]);
            assert_eq!(x[1], vec![q(1, 2), q(0, 1), q(3, 2)]);
            assert_eq!(x[2], vec![q(4, 1), q(1, 1), q(0, 1)]);
        }
        // Walk: both exits share the denominator; the second answer is one minus the first.
        let (rows, up) = walk(40);
        let down: Vec<BigRational> = (0..40)
            .map(|i| if i == 0 { q(1, 2) } else { BigRational::zero() })
            .collect();
        let solver = PadicSolver::new(&rows, &never).unwrap();
        let x = solver.solve_many(&[up, down], &never).unwrap();
        for (a, b) in x[0].iter().zip(&x[1]) {
            assert_eq!(a + b, BigRational::one());
        }
    }

    #[test]
    fn lowest_terms_with_a_large_common_denominator() {
        // den = 3^200 · 5 · 7^3 (over 256 bits); numerators share some of its factors.
        let den: BigInt = BigInt::from(3).pow(200u32) * 5u32 * 343u32;
        let nums: Vec<BigInt> = vec![
            BigInt::from(1),
            BigInt::from(-15),
            BigInt::from(3).pow(150u32) * 49u32 * 11u32,
            BigInt::zero(),
            &den * BigInt::from(2) + 1,
            -(&den * BigInt::from(7)),
            BigInt::from(2).pow(300u32) + 7,
        ];
        let got = reduce_all(nums.clone(), den.magnitude().clone(), &never).unwrap();
        for (x, r) in nums.iter().zip(&got) {
            let expect = BigRational::new(x.clone(), den.clone());
            assert_eq!((r.numer(), r.denom()), (expect.numer(), expect.denom()));
        }
        // All coprime: one gcd for the whole vector.
        let den: BigInt = BigInt::from(2).pow(400u32) + 1u32;
        let nums: Vec<BigInt> = (1..20).map(|i| BigInt::from(3).pow(i * 20)).collect();
        let got = reduce_all(nums.clone(), den.magnitude().clone(), &never).unwrap();
        for (x, r) in nums.iter().zip(&got) {
            let expect = BigRational::new(x.clone(), den.clone());
            assert_eq!((r.numer(), r.denom()), (expect.numer(), expect.denom()));
        }
    }

    #[test]
    fn balanced_digits_match_repeated_division() {
        let p = (1u64 << 62) - 57;
        let mut values = vec![
            BigInt::zero(),
            BigInt::one(),
            -BigInt::one(),
            BigInt::from(p / 2),
            BigInt::from(p / 2 + 1),
            BigInt::from(p),
            -BigInt::from(p - 1),
            BigInt::from(u64::MAX),
        ];
        let mut x = BigInt::from(0x9E37_79B9_7F4A_7C15u64);
        for _ in 0..40 {
            x = &x * BigInt::from(0x9E37_79B9_7F4A_7C15u64) + BigInt::from(12_345);
            values.push(x.clone());
            values.push(-x.clone());
        }
        for v in &values {
            assert_eq!(
                balanced_digits(v, p),
                balanced_digits_reference(v, p),
                "{v}"
            );
        }
    }

    #[test]
    fn verification_rejects_a_wrong_candidate() {
        let (rows, rhs) = dense_chain(5);
        for layout in [Layout::Dense, Layout::Sparse] {
            let solver = PadicSolver::with_layout(&rows, &never, layout).unwrap();
            let lift = solver.start_lifting(&rhs[0], false);
            let x = solver.solve_many(&rhs[..1], &never).unwrap().remove(0);
            // Numerators over the common denominator of the (integer-scaled) system.
            let den = x.iter().fold(BigInt::one(), |acc, v| acc.lcm(v.denom())) * &lift.e;
            let nums: Vec<BigInt> = x
                .iter()
                .map(|v| v.numer() * (&den / v.denom()) * &lift.e)
                .collect();
            let d = den.magnitude().clone();
            assert!(solver.verify(&nums, &d, &lift.c, false, &never).unwrap());
            let mut wrong = nums.clone();
            wrong[2] += 1;
            assert!(!solver.verify(&wrong, &d, &lift.c, false, &never).unwrap());
        }
    }

    #[test]
    fn empty_and_zero_right_hand_sides() {
        let solver = PadicSolver::new(&[], &never).unwrap();
        assert_eq!(
            solver.solve_many(&[vec![]], &never).unwrap(),
            vec![Vec::<BigRational>::new()]
        );
        let (rows, _) = walk(5);
        let solver = PadicSolver::new(&rows, &never).unwrap();
        let zero = vec![BigRational::zero(); 5];
        assert_eq!(
            solver
                .solve_many(std::slice::from_ref(&zero), &never)
                .unwrap()[0],
            zero
        );
        assert!(solver.solve_many(&[], &never).unwrap().is_empty());
    }

    #[test]
    fn lehmer_gcd_and_reconstruction_agree_with_plain_arithmetic() {
        let mut rng = XorShift(42);
        for _ in 0..200 {
            let words = 1 + rng.below(12) as usize;
            let mk = |rng: &mut XorShift| {
                let v: Vec<u32> = (0..2 * words).map(|_| rng.next() as u32).collect();
                BigUint::new(v)
            };
            let g = mk(&mut rng) >> (rng.below(300) as usize);
            let a = mk(&mut rng) * &g;
            let b = mk(&mut rng) * &g;
            assert_eq!(gcd_big(&a, &b), a.gcd(&b));
        }
        // Reconstruct n/d modulo a power of a prime.
        let p = lifting_primes().next().unwrap();
        let mut pows = Powers::new(p);
        for _ in 0..50 {
            let nb = 1 + rng.below(500);
            let num: BigInt = BigInt::from(BigUint::new(
                (0..nb / 32 + 1).map(|_| rng.next() as u32).collect(),
            )) - 12345;
            let den = BigUint::new((0..nb / 32 + 1).map(|_| rng.next() as u32 | 1).collect());
            let k = ((2 * nb + 200) / 61 + 2) as usize;
            let m = pows.pow(k);
            if (&den % p).is_zero() {
                continue;
            }
            let dinv = den.modinv(&m).unwrap();
            let nm = BigInt::from(m.clone());
            let s = (num.mod_floor(&nm).to_biguint().unwrap() * dinv) % &m;
            let bound = (&m >> 1u32).sqrt();
            let (rn, rd) = rational_reconstruction(&s, &m, &bound, &bound, p).unwrap();
            let g = num.magnitude().gcd(&den);
            assert_eq!(rd, &den / &g);
            assert_eq!(rn, &num / BigInt::from(g));
        }
    }
}
