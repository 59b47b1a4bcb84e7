//! Conformal inference for one screen: conformity scores from (outcome, prediction,
//! threshold) ([`score`]) and weighted conformal p-values from the labeled scores and
//! weights ([`pvalue`]; Tibshirani, Barber, Candes & Ramdas 2019; Jin & Candes 2023).

pub mod pvalue;
pub mod score;
