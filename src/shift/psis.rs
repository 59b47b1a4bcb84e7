//! Pareto k-hat of the weights' right tail (PSIS; Vehtari, Simpson, Gelman, Yao, Gabry
//! 2024, JMLR 25:72), reproducing arviz's `psislw`, and its sample-size dependent threshold
//! (design.md 2.6). Thresholds for warnings live in `warnings`.

use super::ShiftError;

/// Pareto-smoothed importance sampling shape estimate k-hat of the right tail of the
/// weights, given their logarithms (Vehtari, Simpson, Gelman, Yao, Gabry 2024, JMLR 25:72,
/// "Pareto smoothed importance sampling"), implemented to reproduce arviz 0.x
/// `psislw(log_w, reff=1.0)`'s k.
///
/// # Formula
/// x = log w - max log w; M = ceil(min(0.2 S, 3 sqrt(S))); cutoff = max(the (M+1)-th largest
/// x, log of the smallest normal double); tail = x > cutoff (k = inf if 4 or fewer);
/// y = exp(tail) - exp(cutoff), sorted; generalized Pareto fit by Zhang & Stephens (2009,
/// Technometrics 51:316): m = 30 + floor(sqrt(n)) grid points
/// b_j = 1 / y_n + (1 - sqrt(m / (j - 1/2))) / (3 y_(floor(n/4 + 1/2))), profile
/// k_j = mean log1p(-b_j y), log-likelihood l_j = n (log(-b_j / k_j) - k_j - 1), weights
/// 1 / sum_i exp(l_i - l_j) (those below 10 machine epsilons dropped, then normalized),
/// b = posterior mean, k = mean log1p(-b y), then k <- (n k + 10 * 0.5) / (n + 10).
///
/// # Errors
/// [`ShiftError::NonFinite`] for a NaN or +inf log-weight (a -inf log-weight, a zero
/// weight, is allowed).
///
/// # Examples
/// ```
/// use weighbridge::shift::pareto_khat;
/// // Four or fewer tail values: the shape is not estimable.
/// assert!(pareto_khat(&[0.0, 0.1, 0.2, 0.3, 0.4]).unwrap().is_infinite());
/// ```
pub fn pareto_khat(log_weights: &[f64]) -> Result<f64, ShiftError> {
    if let Some(i) = log_weights
        .iter()
        .position(|v| v.is_nan() || *v == f64::INFINITY)
    {
        return Err(ShiftError::NonFinite {
            feature: "log weight".into(),
            row: i,
            value: log_weights[i],
        });
    }
    let s = log_weights.len();
    if s < 2 {
        return Ok(f64::INFINITY);
    }
    let max = log_weights.iter().fold(f64::NEG_INFINITY, |a, &b| a.max(b));
    let mut x: Vec<f64> = log_weights.iter().map(|v| v - max).collect();
    x.sort_unstable_by(f64::total_cmp);
    let sf = s as f64;
    let tail_len = (0.2 * sf).min(3.0 * (sf / 1.0).sqrt()).ceil() as usize;
    let cutoff_index = s.saturating_sub(tail_len + 1);
    let cutoff = x[cutoff_index].max(f64::MIN_POSITIVE.ln());
    let exp_cutoff = cutoff.exp();
    let tail: Vec<f64> = x
        .iter()
        .filter(|&&v| v > cutoff)
        .map(|v| v.exp() - exp_cutoff)
        .collect();
    if tail.len() <= 4 {
        return Ok(f64::INFINITY);
    }
    Ok(generalized_pareto_shape(&tail))
}

/// Zhang & Stephens (2009) empirical-Bayes shape estimate with the weakly informative
/// prior of arviz's `_gpdfit` (see [`pareto_khat`]); `sorted` ascending, all > 0.
fn generalized_pareto_shape(sorted: &[f64]) -> f64 {
    let n = sorted.len();
    let nf = n as f64;
    let m_est = 30 + (nf.sqrt()) as usize;
    let quartile = sorted[(nf / 4.0 + 0.5) as usize - 1];
    let largest = sorted[n - 1];
    let b: Vec<f64> = (1..=m_est)
        .map(|j| {
            let v = 1.0 - (m_est as f64 / (j as f64 - 0.5)).sqrt();
            v / (3.0 * quartile) + 1.0 / largest
        })
        .collect();
    let mean_log1p = |bj: f64| sorted.iter().map(|y| (-bj * y).ln_1p()).sum::<f64>() / nf;
    let k: Vec<f64> = b.iter().map(|&bj| mean_log1p(bj)).collect();
    let len_scale: Vec<f64> = b
        .iter()
        .zip(&k)
        .map(|(bj, kj)| nf * ((-(bj / kj)).ln() - kj - 1.0))
        .collect();
    let mut weights: Vec<f64> = len_scale
        .iter()
        .map(|lj| 1.0 / len_scale.iter().map(|li| (li - lj).exp()).sum::<f64>())
        .collect();
    let keep: Vec<bool> = weights.iter().map(|w| *w >= 10.0 * f64::EPSILON).collect();
    let mut b_kept = Vec::with_capacity(m_est);
    let mut w_kept = Vec::with_capacity(m_est);
    for ((w, bj), k) in weights.drain(..).zip(&b).zip(&keep) {
        if *k {
            w_kept.push(w);
            b_kept.push(*bj);
        }
    }
    let total: f64 = w_kept.iter().sum();
    let b_post: f64 = b_kept
        .iter()
        .zip(&w_kept)
        .map(|(bj, w)| bj * (w / total))
        .sum();
    let k_post = mean_log1p(b_post);
    (nf * k_post + 10.0 * 0.5) / (nf + 10.0)
}

/// The sample-size dependent k-hat threshold min(1 - 1 / log10(S), 0.7) (Vehtari et al.
/// 2024, section 3.2.4, from memory): above it the weighted estimate is unreliable.
pub fn khat_threshold(sample_size: usize) -> f64 {
    (1.0 - 1.0 / (sample_size as f64).log10()).min(0.7)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn khat_threshold_values() {
        // min(1 - 1/log10(S), 0.7): S = 100 gives 0.5; S = 10^4 gives 0.7 (capped).
        assert!((khat_threshold(100) - 0.5).abs() < 1e-15);
        assert_eq!(khat_threshold(10_000), 0.7);
    }
}
