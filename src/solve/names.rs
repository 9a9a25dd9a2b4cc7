//! The names methods, scopes and patterns go by on the command line, in
//! reports, in model metadata and in `comparison.json`: one `Display` and
//! one `FromStr` each, so every place spells them the same way.

use super::{Method, Pattern, Scope};
use std::fmt;
use std::str::FromStr;

impl Method {
    /// Every method, in the order the comparison lists them.
    pub const ALL: [Method; 4] = [Method::Magnitude, Method::Scaled, Method::Obs, Method::L0];
}

impl fmt::Display for Method {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl FromStr for Method {
    type Err = String;

    fn from_str(s: &str) -> Result<Self, String> {
        Method::ALL.into_iter().find(|m| m.name() == s.trim()).ok_or_else(|| {
            let names: Vec<&str> = Method::ALL.iter().map(|m| m.name()).collect();
            format!("'{s}' is not a method (one of {})", names.join(", "))
        })
    }
}

impl Scope {
    /// `row` or `layer`.
    pub fn name(self) -> &'static str {
        match self {
            Scope::Row => "row",
            Scope::Layer => "layer",
        }
    }
}

impl fmt::Display for Scope {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl FromStr for Scope {
    type Err = String;

    fn from_str(s: &str) -> Result<Self, String> {
        match s.trim() {
            "row" => Ok(Scope::Row),
            "layer" => Ok(Scope::Layer),
            _ => Err(format!("'{s}' is not a scope (row or layer)")),
        }
    }
}

impl Pattern {
    /// The target fraction of zeros of an unstructured pattern.
    pub fn sparsity(self) -> Option<f64> {
        match self {
            Pattern::Unstructured { sparsity, .. } => Some(sparsity),
            Pattern::NofM { .. } => None,
        }
    }

    /// Where the budget applies: `row`, `layer`, or `group` for N:M.
    pub fn scope_name(self) -> &'static str {
        match self {
            Pattern::Unstructured { scope, .. } => scope.name(),
            Pattern::NofM { .. } => "group",
        }
    }

    /// Parse `N:M` with integers `0 < N ≤ M`.
    ///
    /// # Errors
    /// A message quoting `s`.
    pub fn parse_n_of_m(s: &str) -> Result<Pattern, String> {
        let bad = || format!("'{s}' is not of the form N:M with integers 0 < N <= M (e.g. 2:4)");
        let (n, m) = s.split_once(':').ok_or_else(bad)?;
        let (n, m): (usize, usize) =
            (n.trim().parse().map_err(|_| bad())?, m.trim().parse().map_err(|_| bad())?);
        if n == 0 || m == 0 || n > m {
            return Err(bad());
        }
        Ok(Pattern::NofM { n, m })
    }

    /// Parse an unstructured sparsity in `[0, 1)` with the given scope.
    ///
    /// # Errors
    /// A message quoting `s`.
    pub fn parse_sparsity(s: &str, scope: Scope) -> Result<Pattern, String> {
        let x = s.trim().parse::<f64>().map_err(|_| format!("'{s}' is not a number"))?;
        Pattern::unstructured(x, scope)
    }

    /// An unstructured pattern with `sparsity` in `[0, 1)`.
    ///
    /// # Errors
    /// A message quoting `sparsity` when it is outside `[0, 1)`.
    pub fn unstructured(sparsity: f64, scope: Scope) -> Result<Pattern, String> {
        if (0.0..1.0).contains(&sparsity) {
            Ok(Pattern::Unstructured { sparsity, scope })
        } else {
            Err(format!("{sparsity} is outside [0, 1)"))
        }
    }
}

/// The target key: `0.5` for an unstructured sparsity, `2:4` for N:M.
impl fmt::Display for Pattern {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Pattern::Unstructured { sparsity, .. } => write!(f, "{sparsity}"),
            Pattern::NofM { n, m } => write!(f, "{n}:{m}"),
        }
    }
}

/// A target key: `N:M`, or a sparsity in `[0, 1)` with row scope.
impl FromStr for Pattern {
    type Err = String;

    fn from_str(s: &str) -> Result<Self, String> {
        if s.contains(':') {
            Pattern::parse_n_of_m(s)
        } else {
            Pattern::parse_sparsity(s, Scope::Row)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_round_trip() {
        for m in Method::ALL {
            assert_eq!(m.to_string().parse::<Method>(), Ok(m));
        }
        assert!("sgd".parse::<Method>().unwrap_err().contains("magnitude, scaled, obs, l0"));
        for s in ["0.5", "0", "0.875", "2:4", "1:8", "16:16"] {
            assert_eq!(s.parse::<Pattern>().unwrap().to_string(), s);
        }
        assert_eq!(" 1 : 8 ".parse::<Pattern>(), Ok(Pattern::NofM { n: 1, m: 8 }));
        for bad in ["2", "4:2", "0:4", "a:b", "2:0", "2:4:8", "1.0", "-0.1", "x"] {
            assert!(bad.parse::<Pattern>().is_err(), "{bad}");
        }
        let p = Pattern::Unstructured { sparsity: 0.7, scope: Scope::Layer };
        assert_eq!((p.sparsity(), p.scope_name()), (Some(0.7), "layer"));
        assert_eq!(Pattern::NofM { n: 2, m: 4 }.scope_name(), "group");
    }
}
