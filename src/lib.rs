//! pathfold: prices exotic equity payoffs by Monte Carlo.
//!
//! Imports only point down this list. The pipeline, one module per stage: [`syntax`]
//! (text → tree) → [`typing`] (names, types, parameters) → [`compile`] (tree + market →
//! flat program over a time grid) → [`sim`] (paths, variance reduction, statistics), with
//! the inputs read beside them ([`market`], [`files`]). Above the stages, the [`pricing`]
//! service (one file → a priced result) and the services built on it ([`batch`],
//! [`comparison`], [`validation`]); above those, the [`output`] writers; on top, one
//! module per command ([`commands`]), which `main.rs` dispatches to.
//!
//! Using the stages from Rust:
//!
//! ```
//! use pathfold::{syntax, typing};
//!
//! let text = "product \"Call\"\ncurrency USD\nunderlyings ZPHX\nat 1y { pay max(perf(ZPHX) - 1, 0) }\n";
//! let tree = syntax::parse(text).expect("valid syntax");
//! let product = typing::check(&tree, &[]).expect("a typed product");
//! assert_eq!(product.currency, "USD");
//! assert_eq!(product.underlyings[0].text, "ZPHX");
//! ```

pub mod batch;
pub mod calendar;
pub mod closed_form;
pub mod commands;
pub mod comparison;
pub mod compile;
pub mod curve;
pub mod date;
pub mod diagnostic;
pub mod dynamics;
pub mod files;
pub mod fixings;
pub mod ladder;
pub mod market;
pub mod output;
pub mod partial;
pub mod pricing;
pub mod risk;
pub mod sim;
pub mod solve;
pub mod syntax;
pub mod typing;
pub mod validation;
