//! Small descriptive statistics shared by the scores and the regression gate.
//! Every standard deviation is the sample one (divisor n - 1).

/// Arithmetic mean; `None` for an empty slice.
pub fn mean(xs: &[f64]) -> Option<f64> {
    if xs.is_empty() {
        None
    } else {
        Some(xs.iter().sum::<f64>() / xs.len() as f64)
    }
}

/// Sample variance (divisor n - 1), by Welford's one-pass update (Welford 1962,
/// Technometrics 4(3)); `None` for fewer than two values.
pub fn variance(xs: &[f64]) -> Option<f64> {
    if xs.len() < 2 {
        return None;
    }
    let mut m = 0.0;
    let mut s = 0.0;
    for (i, &x) in xs.iter().enumerate() {
        let d = x - m;
        m += d / (i + 1) as f64;
        s += d * (x - m);
    }
    Some(s / (xs.len() - 1) as f64)
}

/// Sample standard deviation (divisor n - 1).
pub fn sd(xs: &[f64]) -> Option<f64> {
    variance(xs).map(f64::sqrt)
}

/// Standard error of the mean, sd / sqrt(n).
pub fn standard_error(xs: &[f64]) -> Option<f64> {
    sd(xs).map(|s| s / (xs.len() as f64).sqrt())
}

/// Empirical quantile with linear interpolation between order statistics (Hyndman & Fan
/// 1996, definition 7); `p` in [0, 1]. Sorts a copy.
pub fn quantile(xs: &[f64], p: f64) -> Option<f64> {
    if xs.is_empty() || !(0.0..=1.0).contains(&p) {
        return None;
    }
    let mut v: Vec<f64> = xs.to_vec();
    v.sort_by(f64::total_cmp);
    let h = (v.len() - 1) as f64 * p;
    let lo = h.floor() as usize;
    let hi = h.ceil() as usize;
    Some(v[lo] + (h - lo as f64) * (v[hi] - v[lo]))
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_relative_eq;

    #[test]
    fn against_statrs() {
        // statrs::statistics as an outside reference for mean, sample variance and quantile.
        use statrs::statistics::{Data, Distribution, OrderStatistics};
        let xs = [2.0, 4.0, 4.0, 4.0, 5.0, 5.0, 7.0, 9.0, 1e9 + 0.5];
        let d = Data::new(xs.to_vec());
        assert_relative_eq!(mean(&xs).unwrap(), d.mean().unwrap(), max_relative = 1e-14);
        assert_relative_eq!(
            variance(&xs).unwrap(),
            d.variance().unwrap(),
            max_relative = 1e-10
        );
        let mut d = Data::new(xs.to_vec());
        // statrs' quantile uses another interpolation rule; the median agrees for odd n.
        assert_relative_eq!(
            quantile(&xs, 0.5).unwrap(),
            d.median(),
            max_relative = 1e-14
        );
        assert!(variance(&[1.0]).is_none());
        assert!(mean(&[]).is_none());
    }

    #[test]
    fn quantile_type7() {
        // Hyndman & Fan 1996, type 7 (R's default): quantile(1:4, 0.25) = 1.75.
        assert_relative_eq!(quantile(&[4.0, 1.0, 3.0, 2.0], 0.25).unwrap(), 1.75);
    }
}
