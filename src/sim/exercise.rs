//! Early exercise by least-squares Monte Carlo (Longstaff–Schwartz): fitting the rule of
//! every `may end` date before a program is priced.
//!
//! The fit runs on its own set of paths: [`FIT_BLOCKS`] blocks drawn from the streams
//! `FIT_STREAM + b` of the run's seed, which no pricing block uses (pricing block `b`
//! draws from stream `b`). Going backwards from the last `may end` date, each date is
//! fitted in one pass over the fit paths: the dates after it end the product by their
//! rules (already fitted), the dates before it never do, and on it the executor keeps each
//! path's variables, stated payment and what had been paid so far ([`Rule::Record`]). What
//! the path is paid afterwards, discounted, is the realised value of going on; it is
//! regressed on the basis of the variables ([`super::rule`]) over the relevant paths, the
//! blocks' normal equations added in block order, so the rule, like the price, has the same
//! bits on any number of threads. Simulating the fit paths again for each date (instead of
//! keeping every path's history) keeps memory bounded; it costs one pass over the fit
//! paths per `may end` date.
//!
//! The price then comes from the ordinary run on the pricing paths with the fitted rule, so
//! it is the value of one fixed, feasible exercise policy, estimated on paths independent
//! of the fit: biased only by that policy falling short of the best one, which makes it
//! low for the holder (who would exercise better) and high for the issuer (who would call
//! better). Control variates apply as for any payoff: the rule is fixed before the
//! pricing paths are drawn.

use std::borrow::Cow;

use rayon::prelude::*;

use super::exec::Workspace;
use super::paths::{Controls, Model};
use super::rule::{basis_len, Normal};
use super::stats::BlockResult;
use super::{Settings, BLOCK};
use crate::compile::{Program, Rule};
use crate::syntax::Party;

/// Blocks of paths the rule is fitted on: 400 blocks of 256, 102,400 paths (antithetic
/// pairs as the run's settings say). Fixed, so that the rule, and so the price, does not
/// depend on `--paths`: an error-bounded run and a split run fit the same rule.
pub const FIT_BLOCKS: u64 = 400;

/// The first RNG stream of the fit paths, far above any pricing block's.
const FIT_STREAM: u64 = 1 << 62;

/// Paths the rule is fitted on.
pub const FIT_PATHS: u64 = FIT_BLOCKS * BLOCK as u64;

/// The program with the rule of every `may end` date fitted (the program itself when it
/// has none).
pub fn prepare<'a>(program: &'a Program, settings: &Settings) -> Cow<'a, Program> {
    if program.choices.is_empty() {
        return Cow::Borrowed(program);
    }
    let mut fitted = program.clone();
    for c in &mut fitted.choices {
        c.rule = Rule::Never;
    }
    let model = Model::new(&fitted);
    let none = Controls::none();
    let plain = Settings { control_variates: false, ..settings.clone() };
    for site in (0..fitted.choices.len()).rev() {
        fitted.choices[site].rule = Rule::Record;
        let m = basis_len(fitted.choices[site].using.len());
        let prog = &fitted;
        let blocks: Vec<Normal> = (0..FIT_BLOCKS)
            .into_par_iter()
            .map_init(
                || (Workspace::new(prog, &model, &none), BlockResult::new(0, 0, 0)),
                |(ws, r), b| {
                    ws.run_block_into(prog, &model, &none, &plain, FIT_STREAM + b, BLOCK, None, r);
                    Normal::of_block(&prog.choices[site], ws.recorded(), ws.payoffs(), BLOCK)
                },
            )
            .collect();
        let mut total = Normal::new(m);
        for b in &blocks {
            total.add(b);
        }
        fitted.choices[site].rule = total.solve();
    }
    Cow::Owned(fitted)
}

/// What a report says about a product with early exercise.
#[derive(Clone, Debug, PartialEq)]
pub struct Exercise {
    pub party: Party,
    /// `may end` dates (statements times run dates).
    pub dates: usize,
    /// Paths the rule was fitted on.
    pub fit_paths: u64,
    /// The most basis functions of one date's regression.
    pub basis: usize,
}

impl Exercise {
    /// The summary of a program's early exercise, if it has any.
    pub fn of(program: &Program) -> Option<Exercise> {
        let first = program.choices.first()?;
        Some(Exercise {
            party: first.party,
            dates: program.choices.len(),
            fit_paths: FIT_PATHS,
            basis: program.choices.iter().map(|c| basis_len(c.using.len())).max().unwrap_or(1),
        })
    }

    /// The direction of the bias: the fitted rule is at best optimal, so the holder's
    /// value is low and the issuer's high.
    pub fn bias(&self) -> &'static str {
        match self.party {
            Party::Holder => "low",
            Party::Issuer => "high",
        }
    }
}
