//! Streaming statistics: means and co-moments that merge exactly in a fixed order.

/// Count, means and the matrix of co-moments `Σ (xᵢ − x̄)(xⱼ − x̄)` of a vector sample.
#[derive(Clone, Debug, PartialEq)]
pub struct Moments {
    n: f64,
    mean: Vec<f64>,
    m2: Vec<f64>,
}

impl Moments {
    pub fn new(dims: usize) -> Self {
        Moments { n: 0.0, mean: vec![0.0; dims], m2: vec![0.0; dims * dims] }
    }

    fn dims(&self) -> usize {
        self.mean.len()
    }

    pub fn count(&self) -> f64 {
        self.n
    }

    pub fn mean(&self, i: usize) -> f64 {
        self.mean[i]
    }

    /// Sample covariance of components `i` and `j`.
    pub fn cov(&self, i: usize, j: usize) -> f64 {
        if self.n < 2.0 {
            return 0.0;
        }
        self.m2[i * self.dims() + j] / (self.n - 1.0)
    }

    pub fn variance(&self, i: usize) -> f64 {
        self.cov(i, i)
    }

    /// Computes the moments of a batch of samples exactly (two passes): `rows[s]` is the
    /// vector of sample `s`, laid out as `columns[i][s]`.
    pub fn of_columns(columns: &[&[f64]]) -> Self {
        let mut m = Moments::new(0);
        m.fill_from_columns(columns);
        m
    }

    /// [`Moments::of_columns`] written into `self`, whatever it held: the same bits, and
    /// no allocation once `self` has had as many dimensions before.
    pub fn fill_from_columns(&mut self, columns: &[&[f64]]) {
        Self::fill_joint(self, columns, None);
    }

    /// [`Moments::fill_from_columns`] for two batches at once, `a` from `a_columns` and
    /// `b` from `b_columns`. Every sum is formed in the same order as alone, so the bits
    /// are the same; the sums of the two batches run side by side, two independent chains
    /// of additions instead of one after the other.
    pub fn fill_two(a: &mut Moments, a_columns: &[&[f64]], b: &mut Moments, b_columns: &[&[f64]]) {
        Self::fill_joint(a, a_columns, Some((b, b_columns)));
    }

    fn fill_joint(a: &mut Moments, a_columns: &[&[f64]], b: Option<(&mut Moments, &[&[f64]])>) {
        #[cfg(target_arch = "x86_64")]
        {
            if std::is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU has just been checked for AVX2.
                return unsafe { Self::fill_joint_avx2(a, a_columns, b) };
            }
        }
        Self::fill_joint_generic::<false>(a, a_columns, b)
    }

    /// The same sums in the same order, four lanes to a register ([`wide`]): the same
    /// bits.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn fill_joint_avx2(a: &mut Moments, a_columns: &[&[f64]], b: Option<(&mut Moments, &[&[f64]])>) {
        Self::fill_joint_generic::<true>(a, a_columns, b)
    }

    /// Two passes: every mean, then every co-moment `(i, j)` with `i ≤ j`. The sums of
    /// sums are taken two at a time ([`sum_two`]), the co-moments two at a time
    /// ([`co_moments`]), `a`'s then `b`'s; `WIDE` only when the CPU has AVX2.
    #[inline(always)]
    fn fill_joint_generic<const WIDE: bool>(
        a: &mut Moments,
        a_columns: &[&[f64]],
        b: Option<(&mut Moments, &[&[f64]])>,
    ) {
        let (mut b, b_columns) = match b {
            Some((m, c)) => (Some(m), c),
            None => (None, &[][..]),
        };
        let len = |columns: &[&[f64]]| columns.first().map_or(0, |c| c.len());
        let (na, nb) = (len(a_columns), len(b_columns));
        a.reset(a_columns.len());
        a.n = na as f64;
        if let Some(b) = b.as_deref_mut() {
            b.reset(b_columns.len());
            b.n = nb as f64;
        }
        // A batch of no samples keeps its zero means and co-moments.
        let a_columns = if na == 0 { &[][..] } else { a_columns };
        let b_columns = if nb == 0 { &[][..] } else { b_columns };
        let (da, db) = (a_columns.len(), b_columns.len());
        // Pass 1: the means, sums `k` of the list `a`'s columns then `b`'s.
        let column = |k: usize| if k < da { a_columns[k] } else { b_columns[k - da] };
        let mut means = [0.0; 2];
        let mut k = 0;
        while k < da + db {
            let count = (da + db - k).min(2);
            if count == 2 {
                let (x, y) = sum_pair::<WIDE>(column(k), column(k + 1));
                means = [x, y];
            } else {
                means[0] = sum_one::<WIDE>(column(k));
            }
            for (m, &total) in means[..count].iter().enumerate() {
                let at = k + m;
                if at < da {
                    a.mean[at] = total / na as f64;
                } else if let Some(b) = b.as_deref_mut() {
                    b.mean[at - da] = total / nb as f64;
                }
            }
            k += count;
        }
        // Pass 2: the co-moments `(i, j)`, `i ≤ j`, of `a` then of `b`.
        if da <= 1 && db <= 1 {
            // One column each at most (no controls): the squared deviations summed straight
            // from the samples, both sums side by side, with the arithmetic of the general
            // case (the same centred value, the same product, the same order).
            let ca = a_columns.first().copied().unwrap_or(&[]);
            let cb = b_columns.first().copied().unwrap_or(&[]);
            let ma = a.mean.first().copied().unwrap_or(0.0);
            let mb = b.as_deref().and_then(|b| b.mean.first().copied()).unwrap_or(0.0);
            let (sa, sb) = squares_pair::<WIDE>(ca, ma, cb, mb);
            if da == 1 {
                a.m2[0] = sa;
            }
            if let (Some(b), 1) = (b, db) {
                b.m2[0] = sb;
            }
            return;
        }
        // The scratch is taken out of its cell, so the sums run here, in this function's
        // instruction set (a closure given to the cell would not inherit AVX2).
        let mut scratch = SCRATCH.with(|s| s.take());
        co_moments::<WIDE>(a_columns, &a.mean, &mut a.m2, &mut scratch);
        if let Some(b) = b {
            co_moments::<WIDE>(b_columns, &b.mean, &mut b.m2, &mut scratch);
        }
        SCRATCH.with(|s| s.replace(scratch));
    }

    /// Makes `self` the one-dimensional moments of the first component of `other`: the
    /// count, its mean and its sum of squared deviations, bit for bit.
    pub fn copy_first(&mut self, other: &Moments) {
        self.reset(1);
        self.n = other.n;
        if let (Some(&mean), Some(&m2)) = (other.mean.first(), other.m2.first()) {
            self.mean[0] = mean;
            self.m2[0] = m2;
        }
    }

    /// Empties the moments in place, to `dims` dimensions: what [`Moments::new`] gives.
    pub fn reset(&mut self, dims: usize) {
        self.n = 0.0;
        self.mean.clear();
        self.mean.resize(dims, 0.0);
        self.m2.clear();
        self.m2.resize(dims * dims, 0.0);
    }

    /// The count, the means and the co-moment matrix (row by row): everything the moments
    /// are, for storing a partial run exactly.
    pub fn parts(&self) -> (f64, &[f64], &[f64]) {
        (self.n, &self.mean, &self.m2)
    }

    /// The moments [`Moments::parts`] gave; `None` unless `m2` is the square of `mean`.
    pub fn from_parts(n: f64, mean: Vec<f64>, m2: Vec<f64>) -> Option<Moments> {
        (m2.len() == mean.len() * mean.len()).then_some(Moments { n, mean, m2 })
    }

    /// Adds another sample's moments (Chan, Golub and LeVeque's pairwise update).
    pub fn merge(&mut self, other: &Moments) {
        if other.n == 0.0 {
            return;
        }
        if self.n == 0.0 {
            *self = other.clone();
            return;
        }
        let d = self.dims();
        let n = self.n + other.n;
        // Called once per block: differences of means are formed on the fly, not in a Vec.
        let w = self.n * other.n / n;
        for i in 0..d {
            let di = other.mean[i] - self.mean[i];
            for j in 0..d {
                let dj = other.mean[j] - self.mean[j];
                self.m2[i * d + j] += other.m2[i * d + j] + di * dj * w;
            }
        }
        for i in 0..d {
            self.mean[i] += (other.mean[i] - self.mean[i]) * other.n / n;
        }
        self.n = n;
    }
}

thread_local! {
    /// The centred columns of [`co_moments`], reused block after block.
    static SCRATCH: std::cell::RefCell<Vec<f64>> = const { std::cell::RefCell::new(Vec::new()) };
}

/// Co-moments taken together, two at a time: with their sixteen partial sums each, eight
/// registers of four lanes, half of what the CPU has.
const TILE: usize = 2;

/// The co-moments `m2[i·d + j] = Σ (xᵢ − mᵢ)(xⱼ − mⱼ)` of the columns (one length), each
/// summed as [`centred_dot`] sums it (sixteen interleaved partial sums, [`fold`]ed, then
/// the tail), so the same bits. The columns are centred once, into `scratch`; then each
/// column's co-moments with the next two are summed side by side: one load of its centred
/// values serves two products.
#[inline(always)]
fn co_moments<const WIDE: bool>(columns: &[&[f64]], mean: &[f64], m2: &mut [f64], scratch: &mut Vec<f64>) {
    let d = columns.len();
    let n = columns.iter().map(|c| c.len()).min().unwrap_or(0);
    if scratch.len() < d * n {
        scratch.resize(d * n, 0.0);
    }
    let scratch = &mut scratch[..d * n];
    for ((col, m), centred) in columns.iter().zip(mean).zip(scratch.chunks_exact_mut(n.max(1))) {
        for (c, x) in centred.iter_mut().zip(&col[..n]) {
            *c = x - m;
        }
    }
    let whole = n - n % SUM_LANES;
    let scratch = &*scratch;
    let column = |i: usize| &scratch[i * n..(i + 1) * n];
    for i in 0..d {
        let ci = column(i);
        let mut j = i;
        while j < d {
            let t = if d - j >= TILE { TILE } else { 1 };
            let mut acc = [[0.0; SUM_LANES]; TILE];
            if t == TILE && WIDE {
                #[cfg(target_arch = "x86_64")]
                {
                    let cj: [&[f64]; TILE] = std::array::from_fn(|u| column(j + u));
                    // SAFETY: `WIDE` is only set by a caller that checked the CPU for AVX2.
                    acc = unsafe { wide::dot_tile(ci, cj, whole) };
                }
            } else if t == TILE {
                let cj: [&[f64]; TILE] = std::array::from_fn(|u| column(j + u));
                for c in (0..whole).step_by(SUM_LANES) {
                    for u in 0..TILE {
                        for k in 0..SUM_LANES {
                            acc[u][k] += ci[c + k] * cj[u][c + k];
                        }
                    }
                }
            } else if WIDE {
                #[cfg(target_arch = "x86_64")]
                {
                    // SAFETY: `WIDE` is only set by a caller that checked the CPU for AVX2.
                    acc[0] = unsafe { wide::dot_one(ci, column(j), whole) };
                }
            } else {
                let cj = column(j);
                for c in (0..whole).step_by(SUM_LANES) {
                    for k in 0..SUM_LANES {
                        acc[0][k] += ci[c + k] * cj[c + k];
                    }
                }
            }
            for (u, acc) in acc.iter().enumerate().take(t) {
                let cj = column(j + u);
                let mut s = fold(acc);
                for k in whole..n {
                    s += ci[k] * cj[k];
                }
                m2[i * d + j + u] = s;
                m2[(j + u) * d + i] = s;
            }
            j += t;
        }
    }
}

/// Lanes of the partial sums below. A plain left-to-right sum is one long chain of
/// dependent additions, each waiting for the last (four cycles a step on current CPUs);
/// sixteen independent chains, four registers of four lanes with AVX2, keep the adder busy
/// instead (with four, one register, a block's sums were a sixth of a one-step European's
/// time). The order is fixed, so the bits are too.
const SUM_LANES: usize = 16;

/// How the sixteen partial sums are added up: lane by lane, the four groups of four as
/// `(g₀ + g₁) + (g₂ + g₃)` (what four registers do), then those four lanes as
/// `(v₀ + v₁) + (v₂ + v₃)`.
#[inline(always)]
fn fold(acc: &[f64; SUM_LANES]) -> f64 {
    let v: [f64; 4] = std::array::from_fn(|k| (acc[k] + acc[4 + k]) + (acc[8 + k] + acc[12 + k]));
    (v[0] + v[1]) + (v[2] + v[3])
}

/// The sum of `xs`, in a fixed order: sixteen interleaved partial sums, [`fold`]ed, then
/// the tail. With AVX2 the partial sums are the lanes of four registers: the same
/// additions, the same bits.
#[inline]
pub fn sum(xs: &[f64]) -> f64 {
    #[cfg(target_arch = "x86_64")]
    {
        if std::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has just been checked for AVX2.
            return unsafe { wide::sum_two(xs, &[]).0 };
        }
    }
    plain_sum(xs)
}

/// [`sum`] of `a` and of `b`: the same bits as two calls, in one pass while both have
/// whole chunks left.
#[inline]
pub fn sums(a: &[f64], b: &[f64]) -> (f64, f64) {
    #[cfg(target_arch = "x86_64")]
    {
        if std::is_x86_feature_detected!("avx2") {
            return sum_pair::<true>(a, b);
        }
    }
    sum_pair::<false>(a, b)
}

/// [`sum`] without registers of four lanes: the reference the wide sums match.
#[inline(always)]
fn plain_sum(xs: &[f64]) -> f64 {
    let mut acc = [0.0; SUM_LANES];
    let chunks = xs.chunks_exact(SUM_LANES);
    let tail = chunks.remainder();
    for c in chunks {
        for k in 0..SUM_LANES {
            acc[k] += c[k];
        }
    }
    let mut s = fold(&acc);
    for x in tail {
        s += x;
    }
    s
}

/// [`sum`] of `a` and of `b`, the same bits as two calls: the two chains of additions run
/// side by side while both have whole chunks left.
#[inline(always)]
fn sum_two(a: &[f64], b: &[f64]) -> (f64, f64) {
    let (mut acc_a, mut acc_b) = ([0.0; SUM_LANES], [0.0; SUM_LANES]);
    let (whole_a, whole_b) = (a.len() / SUM_LANES, b.len() / SUM_LANES);
    let both = whole_a.min(whole_b) * SUM_LANES;
    for (ca, cb) in a[..both].chunks_exact(SUM_LANES).zip(b[..both].chunks_exact(SUM_LANES)) {
        for k in 0..SUM_LANES {
            acc_a[k] += ca[k];
            acc_b[k] += cb[k];
        }
    }
    let finish = |mut acc: [f64; SUM_LANES], xs: &[f64]| {
        let whole = xs.len() - xs.len() % SUM_LANES;
        for c in xs[both..whole].chunks_exact(SUM_LANES) {
            for k in 0..SUM_LANES {
                acc[k] += c[k];
            }
        }
        let mut s = fold(&acc);
        for x in &xs[whole..] {
            s += x;
        }
        s
    };
    (finish(acc_a, a), finish(acc_b, b))
}

/// `Σ (x − ma)²` over `a` and `Σ (x − mb)²` over `b`, each summed as [`centred_dot`]
/// sums a column with itself: the same bits as [`co_moments`] of one column. The two
/// chains run side by side while both have whole chunks left.
#[inline(always)]
fn squares_two(a: &[f64], ma: f64, b: &[f64], mb: f64) -> (f64, f64) {
    let (mut acc_a, mut acc_b) = ([0.0; SUM_LANES], [0.0; SUM_LANES]);
    let both = (a.len() / SUM_LANES).min(b.len() / SUM_LANES) * SUM_LANES;
    for (ca, cb) in a[..both].chunks_exact(SUM_LANES).zip(b[..both].chunks_exact(SUM_LANES)) {
        for k in 0..SUM_LANES {
            let (u, v) = (ca[k] - ma, cb[k] - mb);
            acc_a[k] += u * u;
            acc_b[k] += v * v;
        }
    }
    let finish = |mut acc: [f64; SUM_LANES], xs: &[f64], m: f64| {
        let whole = xs.len() - xs.len() % SUM_LANES;
        for c in xs[both..whole].chunks_exact(SUM_LANES) {
            for k in 0..SUM_LANES {
                let u = c[k] - m;
                acc[k] += u * u;
            }
        }
        let mut s = fold(&acc);
        for x in &xs[whole..] {
            let u = x - m;
            s += u * u;
        }
        s
    };
    (finish(acc_a, a, ma), finish(acc_b, b, mb))
}

/// [`squares_two`], in registers of four lanes when `WIDE`.
#[inline(always)]
fn squares_pair<const WIDE: bool>(a: &[f64], ma: f64, b: &[f64], mb: f64) -> (f64, f64) {
    #[cfg(target_arch = "x86_64")]
    if WIDE {
        // SAFETY: `WIDE` is only set by a caller that checked the CPU for AVX2.
        return unsafe { wide::squares_two(a, ma, b, mb) };
    }
    squares_two(a, ma, b, mb)
}

/// [`sum_two`], in registers of four lanes when `WIDE` (only ever set after checking the
/// CPU for AVX2).
#[inline(always)]
fn sum_pair<const WIDE: bool>(a: &[f64], b: &[f64]) -> (f64, f64) {
    #[cfg(target_arch = "x86_64")]
    if WIDE {
        // SAFETY: `WIDE` is only set by a caller that checked the CPU for AVX2.
        return unsafe { wide::sum_two(a, b) };
    }
    sum_two(a, b)
}

/// [`sum`], in registers of four lanes when `WIDE`.
#[inline(always)]
fn sum_one<const WIDE: bool>(xs: &[f64]) -> f64 {
    #[cfg(target_arch = "x86_64")]
    if WIDE {
        // SAFETY: `WIDE` is only set by a caller that checked the CPU for AVX2.
        return unsafe { wide::sum_two(xs, &[]).0 };
    }
    plain_sum(xs)
}

/// The pairs of sums with AVX2 registers: the sixteen partial sums of [`sum`] are the lanes
/// of four registers, and every lane does the same additions, subtractions and
/// multiplications in the same order as the plain code (no fused multiply-add), so the
/// bits are the same.
#[cfg(target_arch = "x86_64")]
mod wide {
    use std::arch::x86_64::*;

    use super::SUM_LANES;

    /// Registers of four lanes that hold the partial sums of one sum.
    const REGISTERS: usize = SUM_LANES / 4;

    /// Partial sums: register `r` holds lanes `4r..4r + 4`.
    type Partial = [__m256d; REGISTERS];

    #[inline]
    #[target_feature(enable = "avx2")]
    unsafe fn zero() -> Partial {
        [_mm256_setzero_pd(); REGISTERS]
    }

    /// The partial sums, lane by lane.
    #[inline]
    #[target_feature(enable = "avx2")]
    unsafe fn lanes(acc: &Partial) -> [f64; SUM_LANES] {
        let mut l = [0.0; SUM_LANES];
        for (r, a) in acc.iter().enumerate() {
            _mm256_storeu_pd(l.as_mut_ptr().add(4 * r), *a);
        }
        l
    }

    /// `acc += x[c..c + 16]`, lane by lane.
    #[inline]
    #[target_feature(enable = "avx2")]
    unsafe fn add_chunk(acc: &mut Partial, x: *const f64) {
        for (r, a) in acc.iter_mut().enumerate() {
            *a = _mm256_add_pd(*a, _mm256_loadu_pd(x.add(4 * r)));
        }
    }

    /// The partial sums of two co-moments of centred columns, `ci` with each of `cj`,
    /// over the first `whole` samples: each is [`super::co_moments`]' sixteen chains, in
    /// four registers.
    #[inline]
    #[target_feature(enable = "avx2")]
    pub(super) unsafe fn dot_tile(ci: &[f64], cj: [&[f64]; 2], whole: usize) -> [[f64; SUM_LANES]; 2] {
        let (ci, cj) = (&ci[..whole], cj.map(|c| &c[..whole]));
        let mut acc = [zero(), zero()];
        for c in (0..whole).step_by(SUM_LANES) {
            for r in 0..REGISTERS {
                let x = _mm256_loadu_pd(ci.as_ptr().add(c + 4 * r));
                for (a, y) in acc.iter_mut().zip(cj) {
                    a[r] = _mm256_add_pd(a[r], _mm256_mul_pd(x, _mm256_loadu_pd(y.as_ptr().add(c + 4 * r))));
                }
            }
        }
        [lanes(&acc[0]), lanes(&acc[1])]
    }

    /// [`dot_tile`] for one co-moment.
    #[inline]
    #[target_feature(enable = "avx2")]
    pub(super) unsafe fn dot_one(ci: &[f64], cj: &[f64], whole: usize) -> [f64; SUM_LANES] {
        let (ci, cj) = (&ci[..whole], &cj[..whole]);
        let mut acc = zero();
        for c in (0..whole).step_by(SUM_LANES) {
            for (r, a) in acc.iter_mut().enumerate() {
                let x = _mm256_loadu_pd(ci.as_ptr().add(c + 4 * r));
                *a = _mm256_add_pd(*a, _mm256_mul_pd(x, _mm256_loadu_pd(cj.as_ptr().add(c + 4 * r))));
            }
        }
        lanes(&acc)
    }

    /// [`super::sum_two`].
    #[inline]
    #[target_feature(enable = "avx2")]
    pub(super) unsafe fn sum_two(a: &[f64], b: &[f64]) -> (f64, f64) {
        let both = (a.len() / SUM_LANES).min(b.len() / SUM_LANES) * SUM_LANES;
        let (mut acc_a, mut acc_b) = (zero(), zero());
        for (ca, cb) in a[..both].chunks_exact(SUM_LANES).zip(b[..both].chunks_exact(SUM_LANES)) {
            add_chunk(&mut acc_a, ca.as_ptr());
            add_chunk(&mut acc_b, cb.as_ptr());
        }
        (rest(acc_a, &a[both..]), rest(acc_b, &b[both..]))
    }

    /// [`super::squares_two`].
    #[inline]
    #[target_feature(enable = "avx2")]
    pub(super) unsafe fn squares_two(a: &[f64], ma: f64, b: &[f64], mb: f64) -> (f64, f64) {
        let both = (a.len() / SUM_LANES).min(b.len() / SUM_LANES) * SUM_LANES;
        let (mut acc_a, mut acc_b) = (zero(), zero());
        let (va, vb) = (_mm256_set1_pd(ma), _mm256_set1_pd(mb));
        for (ca, cb) in a[..both].chunks_exact(SUM_LANES).zip(b[..both].chunks_exact(SUM_LANES)) {
            add_squares(&mut acc_a, ca.as_ptr(), va);
            add_squares(&mut acc_b, cb.as_ptr(), vb);
        }
        (rest_squares(acc_a, &a[both..], ma), rest_squares(acc_b, &b[both..], mb))
    }

    /// The squared deviations of `xs` (from a multiple of the lanes on) summed into
    /// `acc`, then [`super::fold`]ed and the tail's added one by one.
    #[inline]
    #[target_feature(enable = "avx2")]
    unsafe fn rest_squares(mut acc: Partial, xs: &[f64], m: f64) -> f64 {
        let chunks = xs.chunks_exact(SUM_LANES);
        let tail = chunks.remainder();
        for c in chunks {
            add_squares(&mut acc, c.as_ptr(), _mm256_set1_pd(m));
        }
        let mut s = super::fold(&lanes(&acc));
        for x in tail {
            let u = x - m;
            s += u * u;
        }
        s
    }

    /// `acc += (x[c..c + 16] − m)²`, lane by lane.
    #[inline]
    #[target_feature(enable = "avx2")]
    unsafe fn add_squares(acc: &mut Partial, x: *const f64, m: __m256d) {
        for (r, a) in acc.iter_mut().enumerate() {
            let u = _mm256_sub_pd(_mm256_loadu_pd(x.add(4 * r)), m);
            *a = _mm256_add_pd(*a, _mm256_mul_pd(u, u));
        }
    }

    /// `xs` (from a multiple of the lanes on) summed into `acc`, then [`super::fold`]ed and
    /// the tail added one by one: how [`super::sum`] finishes.
    #[inline]
    #[target_feature(enable = "avx2")]
    unsafe fn rest(mut acc: Partial, xs: &[f64]) -> f64 {
        let chunks = xs.chunks_exact(SUM_LANES);
        let tail = chunks.remainder();
        for c in chunks {
            add_chunk(&mut acc, c.as_ptr());
        }
        let mut s = super::fold(&lanes(&acc));
        for x in tail {
            s += x;
        }
        s
    }
}

/// `Σ (xᵢ − mx)(yᵢ − my)`, summed in the same fixed order as [`sum`]: the reference
/// [`co_moments`] matches.
#[cfg(test)]
fn centred_dot(x: &[f64], mx: f64, y: &[f64], my: f64) -> f64 {
    let mut acc = [0.0; SUM_LANES];
    let n = x.len().min(y.len());
    let whole = n - n % SUM_LANES;
    for (cx, cy) in x[..whole].chunks_exact(SUM_LANES).zip(y[..whole].chunks_exact(SUM_LANES)) {
        for k in 0..SUM_LANES {
            acc[k] += (cx[k] - mx) * (cy[k] - my);
        }
    }
    let mut s = fold(&acc);
    for i in whole..n {
        s += (x[i] - mx) * (y[i] - my);
    }
    s
}

/// Everything one block of paths contributes.
#[derive(Clone, Debug, PartialEq)]
pub struct BlockResult {
    /// Moments of (payoff PV, controls…) per sample unit (antithetic pair, or path).
    pub moments: Moments,
    /// Moments of the payoff PV per single path: the plain Monte Carlo baseline.
    pub raw: Moments,
    /// Paths ending on each event date.
    pub ended: Vec<f64>,
    /// Sum of discounted payments on each payment date.
    pub paid: Vec<f64>,
    /// Paths on which each `pay` (by site) paid an amount that is not a finite number;
    /// empty while there are none.
    pub bad_paths: Vec<u64>,
    /// The largest sum over one block's paths of one `pay`, in absolute value (a sum
    /// that is not a number counts as infinite), and its site: the payment to name when
    /// the statistics overflow although every amount is finite.
    pub largest: (f64, u32),
}

impl BlockResult {
    pub fn new(dims: usize, events: usize, payments: usize) -> Self {
        BlockResult {
            moments: Moments::new(dims),
            raw: Moments::new(1),
            ended: vec![0.0; events],
            paid: vec![0.0; payments],
            bad_paths: Vec::new(),
            largest: (0.0, 0),
        }
    }

    /// Empties the result in place: what [`BlockResult::new`] gives, without allocating
    /// once the result has had these sizes before.
    pub fn reset(&mut self, dims: usize, events: usize, payments: usize) {
        self.moments.reset(dims);
        self.raw.reset(1);
        self.ended.clear();
        self.ended.resize(events, 0.0);
        self.paid.clear();
        self.paid.resize(payments, 0.0);
        self.bad_paths.clear();
        self.largest = (0.0, 0);
    }

    /// Counts `count` bad paths at `site` (of `sites` in all), sizing the tally on the
    /// first.
    pub fn note_bad(&mut self, site: usize, sites: usize, count: u64) {
        if self.bad_paths.is_empty() {
            self.bad_paths.resize(sites, 0);
        }
        self.bad_paths[site] += count;
    }

    pub fn merge(&mut self, other: &BlockResult) {
        self.moments.merge(&other.moments);
        self.raw.merge(&other.raw);
        for (a, b) in self.ended.iter_mut().zip(&other.ended) {
            *a += b;
        }
        for (a, b) in self.paid.iter_mut().zip(&other.paid) {
            *a += b;
        }
        if self.bad_paths.len() < other.bad_paths.len() {
            self.bad_paths.resize(other.bad_paths.len(), 0);
        }
        for (a, b) in self.bad_paths.iter_mut().zip(&other.bad_paths) {
            *a += b;
        }
        self.note_total(other.largest.0, other.largest.1);
    }

    /// Records the sum over a block's paths of one payment at `site`, keeping the largest
    /// (the earliest on ties, so the result does not depend on the order of merging
    /// beyond the fixed block order).
    pub fn note_total(&mut self, total: f64, site: u32) {
        let size = if total.is_nan() { f64::INFINITY } else { total.abs() };
        if size > self.largest.0 {
            self.largest = (size, site);
        }
    }

    /// Whether every statistic of the payoff is a finite number. Controls are not
    /// checked: one that overflows is left out of the regression.
    pub fn is_finite(&self) -> bool {
        let m = &self.moments;
        self.bad_paths.is_empty()
            && [m.mean(0), m.variance(0), self.raw.mean(0), self.raw.variance(0)].iter().all(|x| x.is_finite())
            && self.paid.iter().all(|x| x.is_finite())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn merging_in_pieces_matches_one_batch() {
        let x: Vec<f64> = (0..100).map(|i| (f64::from(i) * 0.37).sin()).collect();
        let y: Vec<f64> = (0..100).map(|i| (f64::from(i) * 0.11).cos() + 2.0).collect();
        let whole = Moments::of_columns(&[&x, &y]);
        let mut parts = Moments::of_columns(&[&x[..30], &y[..30]]);
        parts.merge(&Moments::of_columns(&[&x[30..], &y[30..]]));
        assert!((whole.mean(1) - parts.mean(1)).abs() < 1e-14);
        assert!((whole.cov(0, 1) - parts.cov(0, 1)).abs() < 1e-14);
        assert!((whole.variance(0) - parts.variance(0)).abs() < 1e-14);
    }

    /// Numbers of many magnitudes and both signs: any change in the order of the additions
    /// shows in the bits.
    fn awkward(n: usize, salt: f64) -> Vec<f64> {
        (0..n).map(|i| (i as f64 * 0.37 + salt).sin() * 10f64.powi((i % 9) as i32 - 4)).collect()
    }

    /// The moments as the baseline build computed them, one sum after another: the
    /// reference the in-place and paired fills must match bit for bit.
    fn one_by_one(columns: &[&[f64]]) -> Moments {
        let d = columns.len();
        let n = columns.first().map_or(0, |c| c.len());
        let mut m = Moments::new(d);
        if n == 0 {
            return m;
        }
        m.n = n as f64;
        for (i, c) in columns.iter().enumerate() {
            m.mean[i] = plain_sum(c) / n as f64;
        }
        for i in 0..d {
            for j in i..d {
                let s = centred_dot(columns[i], m.mean[i], columns[j], m.mean[j]);
                m.m2[i * d + j] = s;
                m.m2[j * d + i] = s;
            }
        }
        m
    }

    fn bits(m: &Moments) -> Vec<u64> {
        let (n, mean, m2) = m.parts();
        std::iter::once(n).chain(mean.iter().copied()).chain(m2.iter().copied()).map(f64::to_bits).collect()
    }

    #[test]
    fn paired_and_wide_sums_give_the_bits_of_plain_sums() {
        for na in 0..40 {
            for nb in [0, 1, 3, 4, 9, 16, 22, 33, 39] {
                let (a, b) = (awkward(na, 0.1), awkward(nb, 2.3));
                let reference = (plain_sum(&a).to_bits(), plain_sum(&b).to_bits());
                let two = sum_two(&a, &b);
                assert_eq!((two.0.to_bits(), two.1.to_bits()), reference, "lengths {na}, {nb}");
                assert_eq!(sum(&a).to_bits(), reference.0, "length {na}");
                #[cfg(target_arch = "x86_64")]
                if std::is_x86_feature_detected!("avx2") {
                    // SAFETY: the CPU has just been checked for AVX2.
                    let wide_sums = unsafe { wide::sum_two(&a, &b) };
                    assert_eq!((wide_sums.0.to_bits(), wide_sums.1.to_bits()), reference, "lengths {na}, {nb}");
                }
            }
        }
    }

    #[test]
    fn moments_filled_in_place_or_in_pairs_have_the_bits_of_fresh_ones() {
        // Up to nine columns: co-moments four at a time, and the rest one by one.
        let columns: Vec<Vec<f64>> = (0..9).map(|i| awkward(131, f64::from(i))).collect();
        let lanes = awkward(262, 5.0);
        // Storage left over from moments of other sizes, full of other numbers.
        let mut a = Moments::of_columns(&[&lanes[..7], &lanes[7..14], &lanes[14..21], &lanes[21..28], &lanes[28..35]]);
        let mut b = Moments::of_columns(&[&lanes[..3], &lanes[3..6]]);
        for d in 0..=9 {
            for n in [0, 1, 2, 5, 128, 131] {
                let cols: Vec<&[f64]> = columns[..d].iter().map(|c| &c[..n]).collect();
                let reference = bits(&one_by_one(&cols));
                a.fill_from_columns(&cols);
                assert_eq!(bits(&a), reference, "{d} columns of {n}");
                Moments::fill_joint_generic::<false>(&mut a, &cols, None);
                assert_eq!(bits(&a), reference, "{d} columns of {n}, without AVX2");
                assert_eq!(bits(&Moments::of_columns(&cols)), reference, "{d} columns of {n}");
                let raw = [&lanes[..2 * n]];
                Moments::fill_two(&mut a, &cols, &mut b, &raw);
                assert_eq!(bits(&a), reference, "{d} columns of {n}, paired");
                assert_eq!(bits(&b), bits(&one_by_one(&raw)), "{d} columns of {n}, paired");
            }
        }
        let mut first = Moments::new(0);
        first.copy_first(&one_by_one(&[&lanes, &columns[0]]));
        assert_eq!(bits(&first), bits(&one_by_one(&[&lanes])));
    }

    #[test]
    fn a_reset_block_result_is_a_new_one() {
        let mut r = BlockResult::new(3, 4, 5);
        r.moments = Moments::of_columns(&[&[1.0, 2.0], &[3.0, 5.0], &[0.5, 0.25]]);
        r.raw = Moments::of_columns(&[&[1.0, 7.0]]);
        r.ended[2] = 4.0;
        r.paid[1] = -3.0;
        r.note_bad(1, 6, 2);
        r.note_total(9.0, 3);
        r.reset(2, 1, 2);
        assert_eq!(r, BlockResult::new(2, 1, 2));
    }

    #[test]
    fn interleaved_sum_matches_a_plain_sum_on_every_length() {
        // Exact on integers, so any order gives the same value: checks the tail handling.
        for n in 0..40 {
            let xs: Vec<f64> = (0..n).map(f64::from).collect();
            assert_eq!(sum(&xs), f64::from(n * (n - 1).max(0) / 2), "n = {n}");
        }
        let ones = vec![1.0; 7];
        assert_eq!(centred_dot(&ones, 0.5, &ones, 0.25), 7.0 * 0.5 * 0.75);
    }
}
