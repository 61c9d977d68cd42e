//! pathfold: prices exotic equity payoffs by Monte Carlo.
//!
//! The pipeline, one module per stage: [`syntax`] (text → tree) → [`check`] (names, types,
//! parameters) → [`compile`] (tree + market → flat program over a time grid) → [`sim`]
//! (paths, variance reduction, statistics) → [`report`] (table, JSON). [`driver`] chains
//! them; `main.rs` only parses arguments.
//!
//! Using the stages from Rust:
//!
//! ```
//! use pathfold::{check, syntax};
//!
//! let text = "product \"Call\"\ncurrency USD\nunderlyings ZPHX\nat 1y { pay max(perf(ZPHX) - 1, 0) }\n";
//! let tree = syntax::parse(text).expect("valid syntax");
//! let product = check::check(&tree, &[]).expect("a checked product");
//! assert_eq!(product.currency, "USD");
//! assert_eq!(product.underlyings[0].text, "ZPHX");
//! ```

pub mod batch;
pub mod check;
pub mod closed_form;
pub mod compare;
pub mod compile;
pub mod date;
pub mod diagnostic;
pub mod driver;
pub mod partial;
pub mod report;
pub mod sim;
pub mod syntax;
pub mod validate;
