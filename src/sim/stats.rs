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
        #[cfg(target_arch = "x86_64")]
        {
            if std::is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU has just been checked for AVX2.
                return unsafe { Self::of_columns_avx2(columns) };
            }
        }
        Self::of_columns_generic(columns)
    }

    /// The same sums in the same order as the baseline build, four lanes to a register:
    /// the same bits.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn of_columns_avx2(columns: &[&[f64]]) -> Self {
        Self::of_columns_generic(columns)
    }

    #[inline(always)]
    fn of_columns_generic(columns: &[&[f64]]) -> Self {
        let d = columns.len();
        let n = columns.first().map_or(0, |c| c.len());
        let mut m = Moments::new(d);
        if n == 0 {
            return m;
        }
        m.n = n as f64;
        for (i, c) in columns.iter().enumerate() {
            m.mean[i] = sum(c) / n as f64;
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

/// The sum of `xs`, in a fixed order: four interleaved partial sums, then the tail.
#[inline(always)]
pub fn sum(xs: &[f64]) -> f64 {
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
