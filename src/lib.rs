//! pathfold: prices exotic equity payoffs by Monte Carlo.
