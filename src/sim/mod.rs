//! Stage 4: simulation — paths, variance reduction and statistics, and the market data
//! they run on.

pub mod market;
