//! pathfold: prices exotic equity payoffs by Monte Carlo.
pub mod closed_form;
