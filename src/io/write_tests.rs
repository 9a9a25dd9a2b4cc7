//! Tests of `io::write`: golden bytes, round trips, staged commits.
use super::*;
use crate::io::file::tests::raw;
use crate::io::model::tests::sharded_dir;
use crate::io::testdir::TestDir;
use crate::io::Dtype;
use crate::rng::SplitMix64;

fn meta(kv: &[(&str, &str)]) -> BTreeMap<String, String> {
    kv.iter().map(|(k, v)| (k.to_string(), v.to_string())).collect()
}

fn repl(kv: &[(&str, &[f64])]) -> BTreeMap<String, Vec<f64>> {
    kv.iter().map(|(k, v)| (k.to_string(), v.to_vec())).collect()
}

/// Assert `dir` holds exactly `names` (no temp files left behind).
fn assert_files(dir: &Path, names: &[&str]) {
    assert_eq!(TestDir::list(dir), names, "files in {}", dir.display());
}

#[test]
fn golden_bytes_of_a_tiny_file() {
    let d = TestDir::new("w-golden");
    // Input: `b` (F16) stored before `a` (F32), header keys in another
    // order, metadata with a key the caller overrides.
    let input = r#"{"a":{"dtype":"F32","shape":[2],"data_offsets":[2,10]},"__metadata__":{"lopper":"old","format":"pt"},"b":{"dtype":"F16","shape":[1],"data_offsets":[0,2]}}"#;
    let mut data = vec![0x00, 0x3c]; // b = 1.0 in F16
    data.extend(1f32.to_le_bytes());
    data.extend(2f32.to_le_bytes());
    let src = d.join("in.safetensors");
    std::fs::write(&src, raw(input, &data)).unwrap();
    let m = Model::open(&src).unwrap();
    let dst = d.join("out.safetensors");
    let written =
        write_model(&m, &dst, &repl(&[("a", &[0.0, -1.5])]), &meta(&[("lopper", "yes")])).unwrap();
    assert_eq!(written, std::slice::from_ref(&dst));

    // Hand-computed: `{` plus the metadata entry and its comma 47 bytes,
    // the `b` entry and its comma 53, the `a` entry and the closing `}}`
    // 54: 154 bytes, padded with 6 spaces to 160.
    let header = r#"{"__metadata__":{"format":"pt","lopper":"yes"},"b":{"dtype":"F16","shape":[1],"data_offsets":[0,2]},"a":{"dtype":"F32","shape":[2],"data_offsets":[2,10]}}"#;
    assert_eq!(header.len(), 154);
    let mut want = 160u64.to_le_bytes().to_vec();
    want.extend_from_slice(header.as_bytes());
    want.extend_from_slice(b"      ");
    want.extend_from_slice(&[0x00, 0x3c]); // b copied
    want.extend_from_slice(&[0, 0, 0, 0]); // a[0] = +0.0
    want.extend_from_slice(&[0, 0, 0xc0, 0xbf]); // a[1] = -1.5
    assert_eq!(want.len(), 178);
    assert_eq!(std::fs::read(&dst).unwrap(), want);
    assert_files(d.path(), &["in.safetensors", "out.safetensors"]);
}

#[test]
fn round_trip_of_mixed_dtypes() {
    let d = TestDir::new("w-roundtrip");
    let f16 = |v: f32| half::f16::from_f32(v).to_le_bytes();
    let bf16 = |v: f32| half::bf16::from_f32(v).to_le_bytes();
    let header = r#"{"w32":{"dtype":"F32","shape":[2,2],"data_offsets":[0,16]},"w16":{"dtype":"F16","shape":[3],"data_offsets":[16,22]},"wb":{"dtype":"BF16","shape":[1,3],"data_offsets":[22,28]},"ids":{"dtype":"I64","shape":[2],"data_offsets":[28,44]}}"#;
    let mut data: Vec<u8> = [1.0f32, 2.0, 3.0, 4.0].iter().flat_map(|x| x.to_le_bytes()).collect();
    for v in [0.5, -0.25, 8.0] {
        data.extend(f16(v));
    }
    for v in [1.5, 0.0, -3.0] {
        data.extend(bf16(v));
    }
    data.extend(7i64.to_le_bytes());
    data.extend((-1i64).to_le_bytes());
    let src = d.join("in.safetensors");
    std::fs::write(&src, raw(header, &data)).unwrap();
    let m = Model::open(&src).unwrap();
    let dst = d.join("out.safetensors");
    let r = repl(&[("w16", &[0.0, -0.25, 0.1]), ("wb", &[0.0, 0.0, 1.0 / 3.0])]);
    write_model(&m, &dst, &r, &BTreeMap::new()).unwrap();

    let back = Model::open(&dst).unwrap();
    let infos: Vec<_> =
        back.tensors().iter().map(|t| (t.name.clone(), t.dtype, t.shape.clone())).collect();
    let want: Vec<_> =
        m.tensors().iter().map(|t| (t.name.clone(), t.dtype, t.shape.clone())).collect();
    assert_eq!(infos, want);
    assert_eq!(back.get("wb").unwrap().dtype, Dtype::BF16);
    assert_eq!(back.bytes("w32").unwrap(), m.bytes("w32").unwrap());
    assert_eq!(back.bytes("ids").unwrap(), m.bytes("ids").unwrap());
    assert_eq!(back.read_f64("w32").unwrap(), [1.0, 2.0, 3.0, 4.0]);
    // 0.1 in F16 is 0x2e66 = 0.0999755859375 (nearest even of 0.1).
    assert_eq!(back.read_f64("w16").unwrap(), [0.0, -0.25, 0.0999755859375]);
    assert_eq!(back.bytes("w16").unwrap()[4..], 0x2e66u16.to_le_bytes());
    // 1/3 in BF16 is 0x3eab = 0.333984375.
    assert_eq!(back.read_f64("wb").unwrap(), [0.0, 0.0, 0.333984375]);
    assert_eq!(back.zero_fraction("wb").unwrap(), 2.0 / 3.0);
    assert!(back.file_of("w16").unwrap().metadata().is_none());
    // No replacement: the whole file is rewritten byte-identical except
    // for the header padding, which the input already had.
    let same = d.join("same.safetensors");
    write_model(&m, &same, &BTreeMap::new(), &BTreeMap::new()).unwrap();
    assert_eq!(std::fs::read(&same).unwrap(), std::fs::read(&src).unwrap());
}

/// Seeded random files (dtypes, shapes including empty ones, header in
/// offset order, no metadata): rewriting with no replacement, or with
/// every float tensor replaced by its own decoded values, reproduces the
/// input byte for byte.
#[test]
fn random_files_round_trip_byte_exact() {
    let d = TestDir::new("w-random");
    let mut rng = SplitMix64::new(42);
    let dtypes = [Dtype::F32, Dtype::F16, Dtype::BF16, Dtype::F64, Dtype::I64, Dtype::U8];
    for case in 0..40 {
        let mut header = Vec::new();
        let mut data = Vec::new();
        let ntensors = rng.below(5);
        for t in 0..ntensors {
            let dtype = dtypes[rng.below(dtypes.len() as u64) as usize];
            let shape: Vec<usize> = (0..rng.below(3)).map(|_| rng.below(4) as usize).collect();
            let n: usize = shape.iter().product();
            let start = data.len();
            if crate::io::dtype::is_float(dtype) {
                let v: Vec<f64> = (0..n)
                    .map(|_| match rng.below(4) {
                        0 => 0.0,
                        1 => -0.0,
                        _ => rng.below(2001) as f64 / 250.0 - 4.0,
                    })
                    .collect();
                crate::io::dtype::encode_f64(dtype, &v, &mut data).unwrap();
            } else {
                data.extend((0..n * dtype.bitsize() / 8).map(|_| rng.next_u64() as u8));
            }
            let dims: Vec<String> = shape.iter().map(|x| x.to_string()).collect();
            header.push(format!(
                r#""t{t}":{{"dtype":"{dtype}","shape":[{}],"data_offsets":[{start},{}]}}"#,
                dims.join(","),
                data.len()
            ));
        }
        let bytes = raw(&format!("{{{}}}", header.join(",")), &data);
        let src = d.join(&format!("in{case}.safetensors"));
        std::fs::write(&src, &bytes).unwrap();
        let m = Model::open(&src).unwrap();
        assert_eq!(m.tensors().len() as u64, ntensors);
        let out = d.join(&format!("out{case}.safetensors"));
        write_model(&m, &out, &BTreeMap::new(), &BTreeMap::new()).unwrap();
        assert_eq!(std::fs::read(&out).unwrap(), bytes, "case {case}, copy");
        let same: BTreeMap<String, Vec<f64>> = m
            .tensors()
            .iter()
            .filter(|t| t.is_float())
            .map(|t| (t.name.clone(), m.read_f64(&t.name).unwrap()))
            .collect();
        write_model(&m, &out, &same, &BTreeMap::new()).unwrap();
        assert_eq!(std::fs::read(&out).unwrap(), bytes, "case {case}, re-encoded");
    }
}

#[test]
fn sharded_round_trip() {
    let src = TestDir::new("w-shard-src");
    sharded_dir(src.path());
    let dst = TestDir::new("w-shard-dst");
    let out = dst.join("pruned");
    let m = Model::open(src.path()).unwrap();
    let written =
        write_model(&m, &out, &repl(&[("b", &[0.0])]), &meta(&[("pruned", "b")])).unwrap();
    assert_eq!(written.len(), 4);
    assert_files(
        &out,
        &["config.json", "m-1.safetensors", "m-2.safetensors", "m.safetensors.index.json"],
    );
    for same in ["config.json", "m.safetensors.index.json"] {
        assert_eq!(
            std::fs::read(out.join(same)).unwrap(),
            std::fs::read(src.join(same)).unwrap(),
            "{same}"
        );
    }
    let back = Model::open(&out).unwrap();
    assert_eq!(back.read_f64("b").unwrap(), [0.0]);
    assert_eq!(m.read_f64("b").unwrap(), [3.0]);
    for t in ["a", "c"] {
        assert_eq!(back.bytes(t).unwrap(), m.bytes(t).unwrap(), "{t}");
    }
    assert_eq!(back.file_of("a").unwrap().metadata().unwrap()["pruned"], "b");
    // Writing into an existing (empty) directory works too.
    let out2 = dst.join("again");
    std::fs::create_dir(&out2).unwrap();
    write_model(&m, &out2, &BTreeMap::new(), &BTreeMap::new()).unwrap();
    assert_eq!(TestDir::list(&out2).len(), 4);
}

#[test]
fn refuses_to_overwrite_an_input_file() {
    let d = TestDir::new("w-refuse-file");
    let src = d.join("m.safetensors");
    std::fs::write(&src, crate::io::model::tests::f32_file(&[("a", &[1.0])])).unwrap();
    let before = std::fs::read(&src).unwrap();
    let m = Model::open(&src).unwrap();
    // Same file through a different spelling of the path.
    let alias = d.path().join(".").join("m.safetensors");
    let e = write_model(&m, &alias, &repl(&[("a", &[0.0])]), &BTreeMap::new()).unwrap_err();
    assert_eq!(e.kind(), K::WouldOverwriteInput);
    assert!(e.to_string().contains("m.safetensors: is an input file"), "{e}");
    assert_eq!(std::fs::read(&src).unwrap(), before);
    assert_files(d.path(), &["m.safetensors"]);
    // A directory output for a single-file input is refused too.
    let e = write_model(&m, d.path(), &BTreeMap::new(), &BTreeMap::new()).unwrap_err();
    assert_eq!(e.kind(), K::BadOutput);
}

#[test]
fn refuses_to_overwrite_an_input_directory() {
    let d = TestDir::new("w-refuse-dir");
    sharded_dir(d.path());
    let before: Vec<Vec<u8>> =
        TestDir::list(d.path()).iter().map(|n| std::fs::read(d.join(n)).unwrap()).collect();
    let m = Model::open(d.path()).unwrap();
    let e = write_model(&m, d.path(), &repl(&[("a", &[0.0, 0.0])]), &BTreeMap::new()).unwrap_err();
    assert_eq!(e.kind(), K::WouldOverwriteInput);
    assert!(e.to_string().contains("is the directory of the input model"), "{e}");
    // The index opened directly: same directory as output.
    let mi = Model::open(&d.join("m.safetensors.index.json")).unwrap();
    let e = write_model(&mi, d.path(), &BTreeMap::new(), &BTreeMap::new()).unwrap_err();
    assert_eq!(e.kind(), K::WouldOverwriteInput);
    let after: Vec<Vec<u8>> =
        TestDir::list(d.path()).iter().map(|n| std::fs::read(d.join(n)).unwrap()).collect();
    assert_eq!(after, before);
    assert_files(
        d.path(),
        &["config.json", "m-1.safetensors", "m-2.safetensors", "m.safetensors.index.json"],
    );
}

#[test]
fn bad_replacements_write_nothing() {
    let d = TestDir::new("w-bad-repl");
    let header = r#"{"h":{"dtype":"F16","shape":[2],"data_offsets":[0,4]},"i":{"dtype":"I32","shape":[1],"data_offsets":[4,8]}}"#;
    let src = d.join("in.safetensors");
    std::fs::write(&src, raw(header, &[0; 8])).unwrap();
    let m = Model::open(&src).unwrap();
    let dst = d.join("out.safetensors");
    let none = BTreeMap::new();
    let e = write_model(&m, &dst, &repl(&[("h", &[1.0])]), &none).unwrap_err();
    assert_eq!(e.kind(), K::ShapeMismatch);
    assert!(
        e.to_string().contains("out.safetensors: tensor 'h': 1 values were given for shape [2]"),
        "{e}"
    );
    let e = write_model(&m, &dst, &repl(&[("h", &[1.0, 1e6])]), &none).unwrap_err();
    assert_eq!(e.kind(), K::NotRepresentable { index: 1 });
    assert!(e.to_string().contains("value 1000000 at index 1 is not representable in F16"), "{e}");
    let e = write_model(&m, &dst, &repl(&[("h", &[f64::NAN, 0.0])]), &none).unwrap_err();
    assert_eq!(e.kind(), K::NotRepresentable { index: 0 });
    let e = write_model(&m, &dst, &repl(&[("i", &[1.0])]), &none).unwrap_err();
    assert_eq!(e.kind(), K::UnsupportedDtype);
    let e = write_model(&m, &dst, &repl(&[("zz", &[1.0])]), &none).unwrap_err();
    assert_eq!(e.kind(), K::NoSuchTensor);
    assert_files(d.path(), &["in.safetensors"]);
}

#[test]
fn a_staged_set_commits_together_or_leaves_nothing() {
    let d = TestDir::new("w-staged");
    let (a, sub) = (d.join("a.txt"), d.join("new/deeper"));
    {
        let mut st = Staged::new();
        st.file(&a, |w| w.write_all(b"a")).unwrap();
        st.folder(&sub).unwrap();
        st.file(&sub.join("b.txt"), |w| w.write_all(b"b")).unwrap();
        let e = st.file(&d.join("c.txt"), |_| Err(std::io::Error::other("full"))).unwrap_err();
        assert!(e.to_string().contains("c.txt: cannot write: full"), "{e}");
        // Dropped without a commit: nothing new, no temporary.
    }
    assert_files(d.path(), &[]);
    let mut st = Staged::new();
    st.file(&a, |w| w.write_all(b"a")).unwrap();
    st.folder(&sub).unwrap();
    st.file(&sub.join("b.txt"), |w| w.write_all(b"b")).unwrap();
    // Before the commit only hidden temporaries exist.
    assert!(TestDir::list(d.path()).iter().all(|n| n.starts_with('.')));
    assert_eq!(st.commit().unwrap(), [a.clone(), sub.join("b.txt")]);
    assert_files(d.path(), &["a.txt", "new"]);
    assert_eq!(std::fs::read(sub.join("b.txt")).unwrap(), b"b");
    // A folder where a file is expected is refused.
    let e = Staged::new().file(&sub, |_| Ok(())).unwrap_err();
    assert_eq!(e.kind(), K::BadOutput);
}

#[test]
fn write_atomic_cleans_up_on_error() {
    let d = TestDir::new("w-atomic");
    let p = d.join("x.bin");
    std::fs::write(&p, b"old").unwrap();
    let e = write_atomic(&p, |w| {
        w.write_all(b"partial")?;
        Err(std::io::Error::other("disk on fire"))
    })
    .unwrap_err();
    assert_eq!(e.kind(), K::Io);
    assert!(e.to_string().contains("x.bin: cannot write: disk on fire"), "{e}");
    assert_eq!(std::fs::read(&p).unwrap(), b"old");
    assert_files(d.path(), &["x.bin"]);
    write_atomic(&p, |w| w.write_all(b"new")).unwrap();
    assert_eq!(std::fs::read(&p).unwrap(), b"new");
    assert_files(d.path(), &["x.bin"]);
    let e = write_atomic(&d.join("missing/x.bin"), |_| Ok(())).unwrap_err();
    assert_eq!(e.kind(), K::Io);
}
