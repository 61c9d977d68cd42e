//! pathfold: prices exotic equity payoffs by Monte Carlo.
//!
//! The pipeline, one module per stage: [`syntax`] (text → tree) → [`check`] (names, types,
//! parameters) → [`compile`] (tree + market → flat program over a time grid) → [`sim`]
//! (paths, variance reduction, statistics) → [`report`] (table, JSON). [`driver`] chains
//! them; `main.rs` only parses arguments.

pub mod batch;
pub mod check;
pub mod closed_form;
pub mod compare;
pub mod compile;
pub mod date;
pub mod diagnostic;
pub mod driver;
pub mod report;
pub mod sim;
pub mod syntax;
pub mod validate;
