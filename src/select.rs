//! Which tensors are prunable linear weights.
//!
//! By default a tensor is pruned when it is a 2-D floating-point `*.weight`
//! that is not an embedding, a normalisation, or an output head (the final
//! projection onto labels or vocabulary, and poolers, whose errors are not
//! spread over later layers). `--only GLOB` replaces the default rule with
//! "2-D float tensors matching any of these globs"; `--skip GLOB` then removes
//! matches. Globs match the whole tensor name: `*` is any run of characters
//! (dots included), `?` is one character.

/// Name segments that mark a tensor as an embedding table.
const EMBEDDING_PARTS: &[&str] = &["wte", "wpe", "shared", "embed_tokens", "embed_positions"];
/// Name segments that mark an output head or pooler.
const HEAD_PARTS: &[&str] = &["lm_head", "head", "classifier", "pooler", "output_layer", "score"];

/// Does the default rule prune this tensor?
pub fn default_prunable(name: &str, shape: &[usize], is_float: bool) -> bool {
    if !is_float || shape.len() != 2 || !(name == "weight" || name.ends_with(".weight")) {
        return false;
    }
    let lower = name.to_ascii_lowercase();
    !lower.split('.').any(|part| {
        part.contains("embed")
            || part.contains("norm")
            || part.starts_with("ln")
            || EMBEDDING_PARTS.contains(&part)
            || HEAD_PARTS.contains(&part)
    })
}

/// Does `glob` match all of `name`? (`*`: any run, `?`: one character.)
pub fn glob_match(glob: &str, name: &str) -> bool {
    let (g, n): (Vec<char>, Vec<char>) = (glob.chars().collect(), name.chars().collect());
    // Iterative wildcard match with one backtrack point (the last `*`).
    let (mut gi, mut ni) = (0, 0);
    let (mut star, mut mark) = (None, 0);
    while ni < n.len() {
        if gi < g.len() && (g[gi] == '?' || g[gi] == n[ni]) {
            gi += 1;
            ni += 1;
        } else if gi < g.len() && g[gi] == '*' {
            star = Some(gi);
            mark = ni;
            gi += 1;
        } else if let Some(s) = star {
            gi = s + 1;
            mark += 1;
            ni = mark;
        } else {
            return false;
        }
    }
    g[gi..].iter().all(|&c| c == '*')
}

/// The user's `--only` / `--skip` globs.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct Selection {
    /// If non-empty, only 2-D float tensors matching one of these are pruned.
    pub only: Vec<String>,
    /// Tensors matching one of these are never pruned.
    pub skip: Vec<String>,
}

impl Selection {
    /// Is this tensor selected for pruning?
    pub fn selects(&self, name: &str, shape: &[usize], is_float: bool) -> bool {
        let base = if self.only.is_empty() {
            default_prunable(name, shape, is_float)
        } else {
            is_float && shape.len() == 2 && self.only.iter().any(|g| glob_match(g, name))
        };
        base && !self.skip.iter().any(|g| glob_match(g, name))
    }

    /// The `--only` globs that match none of `names`.
    pub fn unmatched_only<'a>(&'a self, names: &[&str]) -> Vec<&'a str> {
        self.only
            .iter()
            .filter(|g| !names.iter().any(|n| glob_match(g, n)))
            .map(String::as_str)
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn globs() {
        assert!(glob_match("*.weight", "a.b.weight"));
        assert!(glob_match(
            "encoder.layer.?.attention.*",
            "encoder.layer.3.attention.self.query.weight"
        ));
        assert!(!glob_match("encoder.layer.?.x", "encoder.layer.10.x"));
        assert!(glob_match("*", ""));
        assert!(!glob_match("a*b", "acbd"));
        assert!(glob_match("a*b*c", "aXbYbZc"));
    }

    #[test]
    fn default_rule_on_bert_style_names() {
        let yes =
            ["encoder.layer.0.attention.self.query.weight", "encoder.layer.5.output.dense.weight"];
        for n in yes {
            assert!(default_prunable(n, &[384, 384], true), "{n}");
        }
        let no = [
            ("embeddings.word_embeddings.weight", vec![30522, 384]),
            ("encoder.layer.0.attention.output.LayerNorm.weight", vec![384]),
            ("pooler.dense.weight", vec![384, 384]),
            ("lm_head.weight", vec![100, 384]),
            ("head.weight", vec![6, 384]),
            ("encoder.layer.0.output.dense.bias", vec![384]),
            ("model.norm.weight", vec![384]),
            ("transformer.wte.weight", vec![50257, 768]),
        ];
        for (n, s) in no {
            assert!(!default_prunable(n, &s, true), "{n}");
        }
        assert!(!default_prunable("x.weight", &[4, 4], false));
    }

    #[test]
    fn only_and_skip() {
        let s = Selection { only: vec!["pooler.*".into()], skip: vec![] };
        assert!(s.selects("pooler.dense.weight", &[4, 4], true));
        assert!(!s.selects("encoder.q.weight", &[4, 4], true));
        assert!(!s.selects("pooler.dense.bias", &[4], true));
        let s = Selection { only: vec![], skip: vec!["*.query.*".into()] };
        assert!(!s.selects("l.0.query.weight", &[4, 4], true));
        assert!(s.selects("l.0.key.weight", &[4, 4], true));
        let s = Selection { only: vec!["nope*".into(), "l.*".into()], skip: vec![] };
        assert_eq!(s.unmatched_only(&["l.0.key.weight"]), vec!["nope*"]);
    }
}
