//! Output targets checked against inputs before any work: no output may
//! replace a file the command reads, and no two outputs may share a path.

use crate::error::{Error, Result};
use crate::io::{canonical_target, Model};
use std::path::{Path, PathBuf};

/// Every file a command on `model` reads: its weight files, the model
/// folder, its `config.json` and `tokenizer.json` when present, and
/// `extra` (calibration data, evaluation text), all canonical.
pub fn input_files(model: &Model, extra: &[&Path]) -> Vec<PathBuf> {
    let mut inputs = model.input_files();
    let root = model.layout().root();
    inputs.push(canonical_target(root));
    let dir = crate::arch::model_dir(model);
    for name in ["config.json", "tokenizer.json"] {
        let p = dir.join(name);
        if p.is_file() {
            inputs.push(canonical_target(&p));
        }
    }
    inputs.extend(extra.iter().map(|p| canonical_target(p)));
    inputs
}

/// Refuse an output (`(flag, path)`) that is one of `inputs`, or that
/// shares its path with an earlier output.
///
/// # Errors
/// [`crate::error::ErrorKind::Usage`], naming the flag and path.
pub fn check_distinct(inputs: &[PathBuf], outs: &[(&str, &Path)]) -> Result<()> {
    for (i, (flag, p)) in outs.iter().enumerate() {
        let c = canonical_target(p);
        if inputs.contains(&c) {
            return Err(Error::usage(format!(
                "{flag} {}: refusing to overwrite an input file",
                p.display()
            ))
            .with_path(p));
        }
        if let Some((other, _)) = outs[..i].iter().find(|(_, q)| canonical_target(q) == c) {
            return Err(Error::usage(format!(
                "{flag} {} is the same path as {other}",
                p.display()
            ))
            .with_path(p));
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::error::ErrorKind;

    #[test]
    fn outputs_must_differ_from_inputs_and_each_other() {
        let input = canonical_target(Path::new("Cargo.toml"));
        assert_eq!(input, Path::new("Cargo.toml").canonicalize().unwrap());
        let e = check_distinct(
            std::slice::from_ref(&input),
            &[("--report", Path::new("./Cargo.toml"))],
        )
        .unwrap_err();
        assert_eq!(e.kind(), ErrorKind::Usage);
        assert_eq!(e.to_string(), "--report ./Cargo.toml: refusing to overwrite an input file");
        let e =
            check_distinct(&[], &[("-o", Path::new("a.json")), ("--trace", Path::new("a.json"))])
                .unwrap_err();
        assert_eq!(e.to_string(), "--trace a.json is the same path as -o");
        assert!(check_distinct(&[input], &[("-o", Path::new("new.safetensors"))]).is_ok());
    }
}
