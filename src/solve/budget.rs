//! How many weights survive: the one place that turns a sparsity fraction into
//! counts, so every solver and the report agree.
//!
//! The number of zeros is `round(s · len)`, clamped to `len`; the kept count is
//! the rest. A per-row budget applies this to `d_in`, a per-layer budget to
//! `d_out · d_in`.

/// Zeros for a fraction `sparsity` of `len` entries: `round(s · len)`.
pub fn zeros(sparsity: f64, len: usize) -> usize {
    let z = (sparsity * len as f64).round();
    if z <= 0.0 {
        0
    } else {
        (z as usize).min(len)
    }
}

/// Weights kept out of `len` at `sparsity`.
pub fn kept(sparsity: f64, len: usize) -> usize {
    len - zeros(sparsity, len)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rounding_is_to_nearest() {
        assert_eq!(zeros(0.5, 10), 5);
        assert_eq!(zeros(0.7, 10), 7); // 0.7 * 10 = 7.000000000000001
        assert_eq!(zeros(0.9, 384), 346); // 345.6 -> 346
        assert_eq!(kept(0.0, 7), 7);
        assert_eq!(zeros(0.999_999, 3), 3);
    }
}
