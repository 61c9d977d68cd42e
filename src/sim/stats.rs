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
    /// each pass are taken two at a time ([`sum_two`], [`centred_dot_two`]), in the order
    /// `a`'s then `b`'s; `WIDE` only when the CPU has AVX2.
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
        // Pass 2: the co-moments, the pairs `(i, j)`, `i ≤ j`, of `a` then of `b`.
        let pairs = |d: usize| (0..d).flat_map(move |i| (i..d).map(move |j| (i, j)));
        let mut tasks = pairs(da).map(|(i, j)| (false, i, j)).chain(pairs(db).map(|(i, j)| (true, i, j)));
        loop {
            let (first, second) = (tasks.next(), tasks.next());
            let Some(first) = first else { break };
            let operands = |(in_b, i, j): (bool, usize, usize), a: &Moments, b: &Option<&mut Moments>| {
                let (columns, mean) = match (in_b, b) {
                    (true, Some(b)) => (b_columns, &b.mean),
                    _ => (a_columns, &a.mean),
                };
                (columns[i], mean[i], columns[j], mean[j])
            };
            let x = operands(first, a, &b);
            let sums = match second {
                Some(second) => {
                    let y = operands(second, a, &b);
                    let (sx, sy) = centred_dot_pair::<WIDE>(x, y);
                    [Some((first, sx)), Some((second, sy))]
                }
                None => [Some((first, centred_dot_one::<WIDE>(x))), None],
            };
            for ((in_b, i, j), s) in sums.into_iter().flatten() {
                let target = match (in_b, b.as_deref_mut()) {
                    (true, Some(b)) => b,
                    _ => &mut *a,
                };
                let d = target.dims();
                target.m2[i * d + j] = s;
                target.m2[j * d + i] = s;
            }
        }
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

/// Lanes of the partial sums below. A plain left-to-right sum is one long chain of
/// dependent additions; four independent chains run in parallel and vectorise. The order
/// is fixed, so the bits are too.
const SUM_LANES: usize = 4;

/// The sum of `xs`, in a fixed order: four interleaved partial sums, then the tail. With
/// AVX2 the partial sums are the lanes of one register: the same additions, the same bits.
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
    let mut s = (acc[0] + acc[1]) + (acc[2] + acc[3]);
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
        let mut s = (acc[0] + acc[1]) + (acc[2] + acc[3]);
        for x in &xs[whole..] {
            s += x;
        }
        s
    };
    (finish(acc_a, a), finish(acc_b, b))
}

/// [`sum_two`], four lanes to a register when `WIDE` (only ever set after checking the
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

/// [`sum`], four lanes to a register when `WIDE`.
#[inline(always)]
fn sum_one<const WIDE: bool>(xs: &[f64]) -> f64 {
    #[cfg(target_arch = "x86_64")]
    if WIDE {
        // SAFETY: `WIDE` is only set by a caller that checked the CPU for AVX2.
        return unsafe { wide::sum_two(xs, &[]).0 };
    }
    plain_sum(xs)
}

/// [`centred_dot`], four lanes to a register when `WIDE`.
#[inline(always)]
fn centred_dot_one<const WIDE: bool>(p: Centred<'_>) -> f64 {
    #[cfg(target_arch = "x86_64")]
    if WIDE {
        // SAFETY: `WIDE` is only set by a caller that checked the CPU for AVX2.
        return unsafe { wide::centred_dot_two(p, (&[], 0.0, &[], 0.0)).0 };
    }
    centred_dot(p.0, p.1, p.2, p.3)
}

/// [`centred_dot_two`], four lanes to a register when `WIDE` (only ever set after
/// checking the CPU for AVX2).
#[inline(always)]
fn centred_dot_pair<const WIDE: bool>(p: Centred<'_>, q: Centred<'_>) -> (f64, f64) {
    #[cfg(target_arch = "x86_64")]
    if WIDE {
        // SAFETY: `WIDE` is only set by a caller that checked the CPU for AVX2.
        return unsafe { wide::centred_dot_two(p, q) };
    }
    centred_dot_two(p, q)
}

/// The pairs of sums with AVX2 registers: the four partial sums of [`sum`] are the four
/// lanes of one register, and every lane does the same additions, subtractions and
/// multiplications in the same order as the plain code (no fused multiply-add), so the
/// bits are the same.
#[cfg(target_arch = "x86_64")]
mod wide {
    use std::arch::x86_64::*;

    use super::{Centred, SUM_LANES};

    /// `(l₀ + l₁) + (l₂ + l₃)` of the lanes, then the `tail` added one by one: how
    /// [`super::sum`] finishes.
    #[inline]
    #[target_feature(enable = "avx2")]
    unsafe fn finish(acc: __m256d, tail: impl Iterator<Item = f64>) -> f64 {
        let mut l = [0.0; SUM_LANES];
        _mm256_storeu_pd(l.as_mut_ptr(), acc);
        let mut s = (l[0] + l[1]) + (l[2] + l[3]);
        for x in tail {
            s += x;
        }
        s
    }

    /// [`super::sum_two`].
    #[inline]
    #[target_feature(enable = "avx2")]
    pub(super) unsafe fn sum_two(a: &[f64], b: &[f64]) -> (f64, f64) {
        let both = (a.len() / SUM_LANES).min(b.len() / SUM_LANES) * SUM_LANES;
        let (mut acc_a, mut acc_b) = (_mm256_setzero_pd(), _mm256_setzero_pd());
        for (ca, cb) in a[..both].chunks_exact(SUM_LANES).zip(b[..both].chunks_exact(SUM_LANES)) {
            acc_a = _mm256_add_pd(acc_a, _mm256_loadu_pd(ca.as_ptr()));
            acc_b = _mm256_add_pd(acc_b, _mm256_loadu_pd(cb.as_ptr()));
        }
        (rest(acc_a, &a[both..]), rest(acc_b, &b[both..]))
    }

    /// `xs` (from a multiple of the lanes on) summed into `acc`.
    #[inline]
    #[target_feature(enable = "avx2")]
    unsafe fn rest(mut acc: __m256d, xs: &[f64]) -> f64 {
        let chunks = xs.chunks_exact(SUM_LANES);
        let tail = chunks.remainder();
        for c in chunks {
            acc = _mm256_add_pd(acc, _mm256_loadu_pd(c.as_ptr()));
        }
        finish(acc, tail.iter().copied())
    }

    /// [`super::centred_dot_two`].
    #[inline]
    #[target_feature(enable = "avx2")]
    pub(super) unsafe fn centred_dot_two<'c>(p: Centred<'c>, q: Centred<'c>) -> (f64, f64) {
        let (np, nq) = (p.0.len().min(p.2.len()), q.0.len().min(q.2.len()));
        let both = (np / SUM_LANES).min(nq / SUM_LANES) * SUM_LANES;
        let (mut acc_p, mut acc_q) = (_mm256_setzero_pd(), _mm256_setzero_pd());
        let (mp, mq) = (means(p), means(q));
        let pairs =
            |(x, _, y, _): Centred<'c>| x[..both].chunks_exact(SUM_LANES).zip(y[..both].chunks_exact(SUM_LANES));
        for ((px, py), (qx, qy)) in pairs(p).zip(pairs(q)) {
            acc_p = step(acc_p, px, py, mp);
            acc_q = step(acc_q, qx, qy, mq);
        }
        let from = |(x, mx, y, my): Centred<'c>, n: usize| -> Centred<'c> { (&x[both..n], mx, &y[both..n], my) };
        (centred_rest(acc_p, from(p, np)), centred_rest(acc_q, from(q, nq)))
    }

    /// The two means of a co-moment, each in all four lanes.
    #[inline]
    #[target_feature(enable = "avx2")]
    unsafe fn means((_, mx, _, my): Centred<'_>) -> (__m256d, __m256d) {
        (_mm256_set1_pd(mx), _mm256_set1_pd(my))
    }

    /// `acc + (x − mx)(y − my)` on four samples.
    #[inline]
    #[target_feature(enable = "avx2")]
    unsafe fn step(acc: __m256d, x: &[f64], y: &[f64], (mx, my): (__m256d, __m256d)) -> __m256d {
        let dx = _mm256_sub_pd(_mm256_loadu_pd(x.as_ptr()), mx);
        let dy = _mm256_sub_pd(_mm256_loadu_pd(y.as_ptr()), my);
        _mm256_add_pd(acc, _mm256_mul_pd(dx, dy))
    }

    /// The centred sum of `p` (equal lengths, from a multiple of the lanes on) into `acc`.
    #[inline]
    #[target_feature(enable = "avx2")]
    unsafe fn centred_rest(mut acc: __m256d, p: Centred<'_>) -> f64 {
        let (x, mx, y, my) = p;
        let whole = x.len() - x.len() % SUM_LANES;
        let m = means(p);
        for (cx, cy) in x[..whole].chunks_exact(SUM_LANES).zip(y[..whole].chunks_exact(SUM_LANES)) {
            acc = step(acc, cx, cy, m);
        }
        finish(acc, x[whole..].iter().zip(&y[whole..]).map(|(x, y)| (x - mx) * (y - my)))
    }
}

/// The operands of one co-moment: `(x, mx, y, my)`.
type Centred<'c> = (&'c [f64], f64, &'c [f64], f64);

/// [`centred_dot`] of `p` and of `q`, the same bits as two calls: the two chains of
/// additions run side by side while both have whole chunks left.
#[inline(always)]
fn centred_dot_two(p: Centred<'_>, q: Centred<'_>) -> (f64, f64) {
    let (mut acc_p, mut acc_q) = ([0.0; SUM_LANES], [0.0; SUM_LANES]);
    let (np, nq) = (p.0.len().min(p.2.len()), q.0.len().min(q.2.len()));
    let both = (np / SUM_LANES).min(nq / SUM_LANES) * SUM_LANES;
    let (px, py, qx, qy) = (&p.0[..both], &p.2[..both], &q.0[..both], &q.2[..both]);
    for (((cpx, cpy), cqx), cqy) in px
        .chunks_exact(SUM_LANES)
        .zip(py.chunks_exact(SUM_LANES))
        .zip(qx.chunks_exact(SUM_LANES))
        .zip(qy.chunks_exact(SUM_LANES))
    {
        for k in 0..SUM_LANES {
            acc_p[k] += (cpx[k] - p.1) * (cpy[k] - p.3);
            acc_q[k] += (cqx[k] - q.1) * (cqy[k] - q.3);
        }
    }
    let finish = |mut acc: [f64; SUM_LANES], (x, mx, y, my): Centred<'_>, n: usize| {
        let whole = n - n % SUM_LANES;
        for (cx, cy) in x[both..whole].chunks_exact(SUM_LANES).zip(y[both..whole].chunks_exact(SUM_LANES)) {
            for k in 0..SUM_LANES {
                acc[k] += (cx[k] - mx) * (cy[k] - my);
            }
        }
        let mut s = (acc[0] + acc[1]) + (acc[2] + acc[3]);
        for i in whole..n {
            s += (x[i] - mx) * (y[i] - my);
        }
        s
    };
    (finish(acc_p, p, np), finish(acc_q, q, nq))
}

/// `Σ (xᵢ − mx)(yᵢ − my)`, summed in the same fixed order as [`sum`].
#[inline(always)]
fn centred_dot(x: &[f64], mx: f64, y: &[f64], my: f64) -> f64 {
    let mut acc = [0.0; SUM_LANES];
    let n = x.len().min(y.len());
    let whole = n - n % SUM_LANES;
    for (cx, cy) in x[..whole].chunks_exact(SUM_LANES).zip(y[..whole].chunks_exact(SUM_LANES)) {
        for k in 0..SUM_LANES {
            acc[k] += (cx[k] - mx) * (cy[k] - my);
        }
    }
    let mut s = (acc[0] + acc[1]) + (acc[2] + acc[3]);
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
        for na in 0..23 {
            for nb in [0, 1, 3, 4, 9, 16, 22] {
                let (a, b) = (awkward(na, 0.1), awkward(nb, 2.3));
                let (ya, yb) = (awkward(na, 1.7), awkward(nb, 0.9));
                let reference = (plain_sum(&a).to_bits(), plain_sum(&b).to_bits());
                let two = sum_two(&a, &b);
                assert_eq!((two.0.to_bits(), two.1.to_bits()), reference, "lengths {na}, {nb}");
                assert_eq!(sum(&a).to_bits(), reference.0, "length {na}");
                let (p, q) = ((&a[..], 0.3, &ya[..], -0.2), (&b[..], -1.1, &yb[..], 0.7));
                let dots = (centred_dot(p.0, p.1, p.2, p.3).to_bits(), centred_dot(q.0, q.1, q.2, q.3).to_bits());
                let two = centred_dot_two(p, q);
                assert_eq!((two.0.to_bits(), two.1.to_bits()), dots, "lengths {na}, {nb}");
                #[cfg(target_arch = "x86_64")]
                if std::is_x86_feature_detected!("avx2") {
                    // SAFETY: the CPU has just been checked for AVX2.
                    let (wide_sums, wide_dots) = unsafe { (wide::sum_two(&a, &b), wide::centred_dot_two(p, q)) };
                    assert_eq!((wide_sums.0.to_bits(), wide_sums.1.to_bits()), reference, "lengths {na}, {nb}");
                    assert_eq!((wide_dots.0.to_bits(), wide_dots.1.to_bits()), dots, "lengths {na}, {nb}");
                }
            }
        }
    }

    #[test]
    fn moments_filled_in_place_or_in_pairs_have_the_bits_of_fresh_ones() {
        let columns: Vec<Vec<f64>> = (0..4).map(|i| awkward(131, f64::from(i))).collect();
        let lanes = awkward(262, 5.0);
        // Storage left over from moments of other sizes, full of other numbers.
        let mut a = Moments::of_columns(&[&lanes[..7], &lanes[7..14], &lanes[14..21], &lanes[21..28], &lanes[28..35]]);
        let mut b = Moments::of_columns(&[&lanes[..3], &lanes[3..6]]);
        for d in 0..=4 {
            for n in [0, 1, 2, 5, 128, 131] {
                let cols: Vec<&[f64]> = columns[..d].iter().map(|c| &c[..n]).collect();
                let reference = bits(&one_by_one(&cols));
                a.fill_from_columns(&cols);
                assert_eq!(bits(&a), reference, "{d} columns of {n}");
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
        for n in 0..20 {
            let xs: Vec<f64> = (0..n).map(f64::from).collect();
            assert_eq!(sum(&xs), f64::from(n * (n - 1).max(0) / 2), "n = {n}");
        }
        let ones = vec![1.0; 7];
        assert_eq!(centred_dot(&ones, 0.5, &ones, 0.25), 7.0 * 0.5 * 0.75);
    }
}
