//! Paths: exact log-GBM steps between grid dates, Cholesky-correlated normals, the
//! Brownian-bridge resolution of continuously monitored barriers, and the control
//! variates read off each path.

use rand::Rng;
use rand_distr::{Open01, StandardNormal};
use rand_pcg::Pcg64;

use crate::check::Direction;
use crate::closed_form::{black_scholes, geometric_asian_discrete, geometric_average_forward, OptionKind};
use crate::compile::Program;

/// Per-step constants of the risk-neutral dynamics
/// `ln S(t+Δ) = ln S(t) + (r − q − σ²/2)Δ + σ√Δ·Z`, exact for any step length.
#[derive(Clone, Debug)]
pub struct Model {
    /// `drift[k][a]`: the log drift of asset `a` over the step ending at grid index `k`.
    pub drift: Vec<Vec<f64>>,
    /// `scale[k][a]`: σ√Δ over that step.
    pub scale: Vec<Vec<f64>>,
    pub log_spot: Vec<f64>,
    /// Lower-triangular correlation factor.
    pub cholesky: Vec<Vec<f64>>,
    /// Assets watched by a barrier, whose bridge uniforms are drawn.
    pub watched: Vec<usize>,
}

impl Model {
    pub fn new(p: &Program) -> Self {
        let n = p.grid.len();
        let mut drift = vec![vec![0.0; p.assets.len()]; n];
        let mut scale = vec![vec![0.0; p.assets.len()]; n];
        for k in 1..n {
            let dt = p.grid[k] - p.grid[k - 1];
            for (a, m) in p.assets.iter().enumerate() {
                drift[k][a] = (p.rate - m.dividend_yield - 0.5 * m.volatility * m.volatility) * dt;
                scale[k][a] = m.volatility * dt.sqrt();
            }
        }
        let mut watched: Vec<usize> = p.monitors.iter().map(|m| m.asset).collect();
        watched.sort_unstable();
        watched.dedup();
        let cholesky = if p.cholesky.is_empty() { identity(p.assets.len()) } else { p.cholesky.clone() };
        Model { drift, scale, log_spot: p.assets.iter().map(|a| a.spot.ln()).collect(), cholesky, watched }
    }
}

fn identity(n: usize) -> Vec<Vec<f64>> {
    (0..n).map(|i| (0..=i).map(|j| if i == j { 1.0 } else { 0.0 }).collect()).collect()
}

/// Scratch buffers for one block's paths, laid out `[(grid index · assets + asset) · BLOCK + lane]`.
pub struct PathBuffers {
    pub levels: Vec<f64>,
    /// Log levels, kept only when barriers or geometric controls need them.
    pub logs: Vec<f64>,
    /// Bridge uniforms `[(watched slot · grid + k) · BLOCK + lane]`.
    pub uniforms: Vec<f64>,
    z: Vec<f64>,
    w: Vec<f64>,
    x: Vec<f64>,
    keep_logs: bool,
}

impl PathBuffers {
    pub fn new(p: &Program, model: &Model, keep_logs: bool, block: usize) -> Self {
        let cells = p.grid.len() * p.assets.len() * block;
        PathBuffers {
            levels: vec![0.0; cells],
            logs: if keep_logs { vec![0.0; cells] } else { Vec::new() },
            uniforms: vec![0.0; model.watched.len() * p.grid.len() * block],
            z: vec![0.0; p.assets.len()],
            w: vec![0.0; p.assets.len()],
            x: vec![0.0; p.assets.len() * block],
            keep_logs,
        }
    }

    /// Simulates `lanes` paths. With `antithetic`, lanes `h..2h` mirror lanes `0..h`
    /// (`h = lanes / 2`) with every normal negated.
    pub fn generate(
        &mut self,
        p: &Program,
        model: &Model,
        rng: &mut Pcg64,
        lanes: usize,
        antithetic: bool,
        block: usize,
    ) {
        let na = p.assets.len();
        let drawn = if antithetic { lanes / 2 } else { lanes };
        for a in 0..na {
            self.x[a * block..a * block + lanes].fill(model.log_spot[a]);
            let cell = a * block;
            self.levels[cell..cell + lanes].fill(p.assets[a].spot);
            if self.keep_logs {
                self.logs[cell..cell + lanes].fill(model.log_spot[a]);
            }
        }
        for k in 1..p.grid.len() {
            let (drift, scale) = (&model.drift[k], &model.scale[k]);
            for lane in 0..drawn {
                for a in 0..na {
                    self.z[a] = rng.sample(StandardNormal);
                }
                for a in 0..na {
                    let row = &model.cholesky[a];
                    let mut s = 0.0;
                    for (j, c) in row.iter().enumerate() {
                        s += c * self.z[j];
                    }
                    self.w[a] = s;
                }
                for a in 0..na {
                    let step = scale[a] * self.w[a];
                    self.x[a * block + lane] += drift[a] + step;
                    if antithetic {
                        self.x[a * block + lane + drawn] += drift[a] - step;
                    }
                }
            }
            for a in 0..na {
                let cell = (k * na + a) * block;
                let x = &self.x[a * block..a * block + lanes];
                for (out, x) in self.levels[cell..cell + lanes].iter_mut().zip(x) {
                    *out = x.exp();
                }
                if self.keep_logs {
                    self.logs[cell..cell + lanes].copy_from_slice(x);
                }
            }
        }
        let steps = p.grid.len();
        for slot in 0..model.watched.len() {
            for k in 1..steps {
                let base = (slot * steps + k) * block;
                for lane in 0..drawn {
                    let u: f64 = rng.sample(Open01);
                    self.uniforms[base + lane] = u;
                    if antithetic {
                        self.uniforms[base + lane + drawn] = u;
                    }
                }
            }
        }
    }

    /// Resolves each continuously monitored barrier on each path: touched if a grid level
    /// is at or beyond the barrier, or if the Brownian bridge between two grid levels
    /// crosses it, which happens with probability `exp(−2·ln(S₀/H)·ln(S₁/H) / (σ²Δ))`.
    pub fn monitors(&self, p: &Program, model: &Model, lanes: usize, block: usize, out: &mut [Vec<f64>]) {
        let na = p.assets.len();
        let steps = p.grid.len();
        for (m, flags) in p.monitors.iter().zip(out.iter_mut()) {
            let a = m.asset;
            let slot = model.watched.iter().position(|&w| w == a).expect("watched assets include every monitored one");
            let var = p.assets[a].volatility * p.assets[a].volatility;
            let start = (p.start * na + a) * block;
            let down = m.direction == Direction::Down;
            for lane in 0..lanes {
                let h = if m.relative { (m.level * self.levels[start + lane]).ln() } else { m.level.ln() };
                let beyond = |x: f64| if down { x <= h } else { x >= h };
                let at = |k: usize| self.logs[(k * na + a) * block + lane];
                let mut hit = beyond(at(m.from));
                let mut k = m.from + 1;
                while !hit && k <= m.to {
                    let (x0, x1) = (at(k - 1), at(k));
                    if beyond(x1) {
                        hit = true;
                    } else {
                        let dt = p.grid[k] - p.grid[k - 1];
                        let crossing = (-2.0 * (x0 - h) * (x1 - h) / (var * dt)).exp();
                        hit = self.uniforms[(slot * steps + k) * block + lane] < crossing;
                    }
                    k += 1;
                }
                flags[lane] = if hit { 1.0 } else { 0.0 };
            }
        }
    }
}

/// What a control variate reads off a path.
#[derive(Clone, Debug, PartialEq)]
enum ControlKind {
    /// The asset's level at the last grid date.
    Terminal { asset: usize },
    /// A call on the asset's last level.
    Call { asset: usize, strike: f64 },
    /// The geometric mean of the asset's levels on averaging fixings.
    Geometric { asset: usize, fixings: Vec<usize> },
    /// A call on that geometric mean.
    GeometricCall { asset: usize, fixings: Vec<usize>, strike: f64 },
}

#[derive(Clone, Debug, PartialEq)]
struct Control {
    name: String,
    kind: ControlKind,
    discount: f64,
    /// The control's expectation, from a closed form.
    mean: f64,
}

/// The control variates of a program: discounted quantities whose expectations we know in
/// closed form, regressed against the payoff.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Controls {
    list: Vec<Control>,
}

impl Controls {
    pub fn none() -> Self {
        Controls::default()
    }

    /// For each underlying: its discounted last level (expectation `S₀e^{−qT}`) and the
    /// at-the-money-forward call on it (Black–Scholes). For each averaging of an
    /// underlying's levels: the geometric mean over the same fixings and the call on it
    /// struck at the spot (closed form for discrete geometric averages).
    pub fn new(p: &Program) -> Self {
        let mut list = Vec::new();
        let last = p.grid.len() - 1;
        let t = p.grid[last];
        if t <= 0.0 {
            return Controls { list };
        }
        let discount = (-p.rate * t).exp();
        for (a, m) in p.assets.iter().enumerate() {
            let b = p.rate - m.dividend_yield;
            let forward = m.spot * (b * t).exp();
            list.push(Control {
                name: format!("{} forward", m.name),
                kind: ControlKind::Terminal { asset: a },
                discount,
                mean: m.spot * (-m.dividend_yield * t).exp(),
            });
            list.push(Control {
                name: format!("{} call", m.name),
                kind: ControlKind::Call { asset: a, strike: forward },
                discount,
                mean: black_scholes(OptionKind::Call, m.spot, forward, t, p.rate, b, m.volatility),
            });
        }
        for (a, fixings) in &p.averages {
            let m = &p.assets[*a];
            let b = p.rate - m.dividend_yield;
            // A fixing on the valuation date is known, not random: no closed form needed there.
            if fixings.contains(&0) {
                continue;
            }
            let times: Vec<f64> = fixings.iter().map(|&k| p.grid[k]).collect();
            let t_pay = *times.last().unwrap_or(&t);
            let discount = (-p.rate * t_pay).exp();
            let geometric_forward = discount * geometric_average_forward(m.spot, &times, b, m.volatility);
            list.push(Control {
                name: format!("{} geometric average", m.name),
                kind: ControlKind::Geometric { asset: *a, fixings: fixings.clone() },
                discount,
                mean: geometric_forward,
            });
            list.push(Control {
                name: format!("{} geometric-average call", m.name),
                kind: ControlKind::GeometricCall { asset: *a, fixings: fixings.clone(), strike: m.spot },
                discount,
                mean: geometric_asian_discrete(
                    OptionKind::Call,
                    m.spot,
                    m.spot,
                    &times,
                    t_pay,
                    p.rate,
                    b,
                    m.volatility,
                ),
            });
        }
        Controls { list }
    }

    pub fn len(&self) -> usize {
        self.list.len()
    }

    pub fn is_empty(&self) -> bool {
        self.list.is_empty()
    }

    pub fn name(&self, j: usize) -> String {
        self.list[j].name.clone()
    }

    pub fn mean(&self, j: usize) -> f64 {
        self.list[j].mean
    }

    /// Whether any control needs log levels.
    pub fn needs_logs(&self) -> bool {
        self.list.iter().any(|c| matches!(c.kind, ControlKind::Geometric { .. } | ControlKind::GeometricCall { .. }))
    }

    /// Writes control `j`'s discounted value on each path into `out`.
    pub fn values(&self, j: usize, p: &Program, paths: &PathBuffers, lanes: usize, block: usize, out: &mut [f64]) {
        let c = &self.list[j];
        let na = p.assets.len();
        let last = p.grid.len() - 1;
        let cell = |k: usize, a: usize| (k * na + a) * block;
        match &c.kind {
            ControlKind::Terminal { asset } => {
                let s = &paths.levels[cell(last, *asset)..][..lanes];
                for (o, s) in out.iter_mut().zip(s) {
                    *o = c.discount * s;
                }
            }
            ControlKind::Call { asset, strike } => {
                let s = &paths.levels[cell(last, *asset)..][..lanes];
                for (o, s) in out.iter_mut().zip(s) {
                    *o = c.discount * (s - strike).max(0.0);
                }
            }
            ControlKind::Geometric { asset, fixings } | ControlKind::GeometricCall { asset, fixings, .. } => {
                let strike = match &c.kind {
                    ControlKind::GeometricCall { strike, .. } => Some(*strike),
                    _ => None,
                };
                out[..lanes].fill(0.0);
                for &k in fixings {
                    let logs = &paths.logs[cell(k, *asset)..][..lanes];
                    for (o, x) in out.iter_mut().zip(logs) {
                        *o += x;
                    }
                }
                let inv = 1.0 / fixings.len() as f64;
                for o in &mut out[..lanes] {
                    let g = (*o * inv).exp();
                    *o = c.discount * strike.map_or(g, |k| (g - k).max(0.0));
                }
            }
        }
    }
}
