//! Text → token ids → fixed-length windows: reading UTF-8 text, loading a
//! model's `tokenizer.json`, the special tokens a family puts around each
//! sequence, and the seeded draw of window offsets.
//!
//! Used by text calibration ([`crate::source`]) and by end-to-end
//! evaluation ([`crate::evaluate`]); it knows nothing of either.

use crate::arch::Family;
use crate::error::Error;
use crate::rng::SplitMix64;
use std::path::Path;
use tokenizers::Tokenizer;

/// Read a UTF-8 text file; the error names the file and the byte offset of
/// the first invalid sequence.
pub fn read_text(path: &Path) -> Result<String, Error> {
    let bad = |m: String| Error::input(format!("{}: {m}", path.display())).with_path(path);
    crate::io::check_regular(path).map_err(Error::from)?;
    let bytes = std::fs::read(path).map_err(|e| bad(format!("cannot read text ({e})")))?;
    let text = String::from_utf8(bytes).map_err(|e| {
        let at = e.utf8_error().valid_up_to();
        bad(format!("not UTF-8 text (invalid byte sequence at offset {at})"))
    })?;
    if text.trim().is_empty() {
        return Err(bad("holds no text".into()));
    }
    Ok(text)
}

/// Load `dir/tokenizer.json` with padding and truncation turned off (some
/// exports fix padding to a length; windows are cut by lopper instead).
pub fn load_tokenizer(dir: &Path) -> Result<Tokenizer, Error> {
    let path = dir.join("tokenizer.json");
    let bad = |m: String| Error::input(format!("{}: {m}", path.display())).with_path(&path);
    if !path.is_file() {
        return Err(bad("not found; text calibration needs the model's tokenizer.json".into()));
    }
    let mut tok = Tokenizer::from_file(&path).map_err(|e| {
        let text = e.to_string();
        let first = text.lines().next().unwrap_or("unreadable").to_string();
        bad(format!("cannot load the tokenizer ({first})"))
    })?;
    tok.with_padding(None);
    tok.with_truncation(None).map_err(|e| bad(format!("cannot turn truncation off ({e})")))?;
    Ok(tok)
}

/// Token ids of `text` without special tokens. The text is encoded in
/// pieces of about 4 KiB cut after a line break, so memory stays bounded
/// and line breaks stay in the pieces (byte-level tokenizers encode them).
pub fn tokenize(tok: &Tokenizer, text: &str) -> Result<Vec<u32>, String> {
    let mut pieces = Vec::new();
    let mut start = 0;
    while start < text.len() {
        let mut end = (start + 4096).min(text.len());
        if end < text.len() {
            end = text[end..].find('\n').map_or(text.len(), |i| end + i + 1);
        }
        pieces.push(&text[start..end]);
        start = end;
    }
    let enc = tok.encode_batch(pieces, false).map_err(|e| e.to_string())?;
    Ok(enc.iter().flat_map(|e| e.get_ids().iter().copied()).collect())
}

/// Special tokens a family puts around every sequence.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Framing {
    /// Ids before the text (e.g. `[CLS]`, or a beginning-of-sequence id).
    pub prefix: Vec<u32>,
    /// Ids after the text (e.g. `[SEP]`).
    pub suffix: Vec<u32>,
}

impl Framing {
    /// BERT: `[CLS] … [SEP]`; Llama-style: the config's `bos_token_id`;
    /// GPT-2: nothing (common practice for calibration windows).
    pub fn for_network(family: Family, tok: &Tokenizer, dir: &Path) -> Result<Self, Error> {
        let none = Framing { prefix: vec![], suffix: vec![] };
        Ok(match family {
            Family::Bert => match (tok.token_to_id("[CLS]"), tok.token_to_id("[SEP]")) {
                (Some(c), Some(s)) => Framing { prefix: vec![c], suffix: vec![s] },
                _ => none,
            },
            Family::Llama => {
                let cfg = std::fs::read_to_string(dir.join("config.json")).ok();
                let bos = cfg
                    .and_then(|t| serde_json::from_str::<serde_json::Value>(&t).ok())
                    .and_then(|j| j.get("bos_token_id").and_then(|v| v.as_u64()));
                match bos {
                    Some(b) => Framing { prefix: vec![b as u32], suffix: vec![] },
                    None => none,
                }
            }
            Family::Gpt2 => none,
        })
    }

    /// Special tokens per sequence.
    pub fn len(&self) -> usize {
        self.prefix.len() + self.suffix.len()
    }

    /// Whether there are none.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// `prefix ++ content ++ suffix`.
    pub fn frame(&self, content: &[u32]) -> Vec<u32> {
        let mut v = Vec::with_capacity(content.len() + self.len());
        v.extend_from_slice(&self.prefix);
        v.extend_from_slice(content);
        v.extend_from_slice(&self.suffix);
        v
    }
}

/// `count` window starts, each in `0..=n_tokens − len`, drawn uniformly and
/// reproducibly from `seed`.
///
/// # Panics
/// If `len > n_tokens` (caller contract).
#[track_caller]
pub fn draw_windows(n_tokens: usize, count: usize, len: usize, seed: u64) -> Vec<usize> {
    assert!(len <= n_tokens, "window longer than the text");
    let span = (n_tokens - len + 1) as u64;
    let mut rng = SplitMix64::new(seed);
    (0..count).map(|_| rng.below(span) as usize).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn windows_are_reproducible_and_in_range() {
        let a = draw_windows(1000, 50, 128, 7);
        assert_eq!(a, draw_windows(1000, 50, 128, 7));
        assert_ne!(a, draw_windows(1000, 50, 128, 8));
        assert!(a.iter().all(|&s| s + 128 <= 1000));
        // A window as long as the text can only start at 0.
        assert!(draw_windows(64, 5, 64, 1).iter().all(|&s| s == 0));
    }

    #[test]
    fn framing_wraps_content() {
        let f = Framing { prefix: vec![101], suffix: vec![102] };
        assert_eq!(f.frame(&[5, 6]), vec![101, 5, 6, 102]);
        assert_eq!(f.len(), 2);
    }

    #[test]
    fn text_must_be_utf8() {
        let dir = std::env::temp_dir().join(format!("lopper-text-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let p = dir.join("bad.txt");
        std::fs::write(&p, b"valve ok\n\xff\xfe").unwrap();
        let e = read_text(&p).unwrap_err().to_string();
        assert!(e.contains("bad.txt") && e.contains("not UTF-8") && e.contains("offset 9"), "{e}");
        std::fs::write(&p, "  \n").unwrap();
        assert!(read_text(&p).unwrap_err().to_string().contains("holds no text"));
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
