//! End-to-end tests of the `lopper` binary: inspect, prune, the report, and
//! every bad-input case (one-line message naming the culprit, exit code 2,
//! no output file).

mod common;
use common::*;

#[test]
fn inspect_lists_tensors_and_prunable_flags() {
    let dir = Scratch::new("inspect");
    let (model, _) = small_model(&dir);
    let o = lopper(&["inspect", s(&model), "--json"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_str(&stdout(&o)).unwrap();
    let t = v["tensors"].as_array().unwrap();
    assert_eq!(t.len(), 6);
    let prunable: Vec<&str> = t
        .iter()
        .filter(|x| x["prunable"].as_bool().unwrap())
        .map(|x| x["name"].as_str().unwrap())
        .collect();
    assert_eq!(prunable, vec!["enc.0.weight", "enc.1.weight"]);
    let norm = t.iter().find(|x| x["name"] == "norm.weight").unwrap();
    assert_eq!(norm["params"], 6);
    assert_eq!(norm["dtype"], "F32");
    assert_eq!(norm["shape"], serde_json::json!([6]));
    assert_eq!(norm["zero_fraction"], 0.0);
    assert_eq!(v["totals"]["params"], 80 + 48 + 6 + 24 + 6 + 8);
    assert_eq!(v["totals"]["prunable_params"], 48 + 24);

    let o = lopper(&["inspect", s(&model), "--only", "head.*", "--json"]);
    let v: serde_json::Value = serde_json::from_str(&stdout(&o)).unwrap();
    assert_eq!(v["totals"]["prunable_tensors"], 1);
    let o = lopper(&["inspect", s(&model)]);
    let text = stdout(&o);
    assert!(text.contains("enc.1.weight") && text.contains("2 prunable tensors"), "{text}");
}

#[test]
fn per_row_half_magnitude_by_hand() {
    // Worked by hand: each row keeps its two largest |w|; held-out error 0
    // is impossible here, so only the kept values are checked.
    let dir = Scratch::new("byhand");
    let model = dir.path("m.safetensors");
    let w = [0.1f32, -3.0, 2.0, 0.5, 4.0, 0.0, -0.2, -1.0, 1.0, 1.5, -1.2, 2.0];
    write_st(&model, &[f32s("lin.weight", &[3, 4], &w), f32s("lin.bias", &[3], &[1.0, 2.0, 3.0])]);
    let acts = dir.path("a.safetensors");
    write_st(&acts, &[f32s("lin.weight", &[20, 4], &values(80, 9))]);
    let out = dir.path("out.safetensors");
    let report = dir.path("r.json");
    let o = lopper(&[
        "prune",
        s(&model),
        "--activations",
        s(&acts),
        "--sparsity",
        "0.5",
        "--method",
        "magnitude",
        "-o",
        s(&out),
        "--report",
        s(&report),
        "--quiet",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(stdout(&o).is_empty(), "--quiet prints nothing: {}", stdout(&o));
    let (t, meta) = read_st(&out);
    let got = as_f32(&t["lin.weight"].2);
    assert_eq!(got, vec![0.0, -3.0, 2.0, 0.0, 4.0, 0.0, 0.0, -1.0, 0.0, 1.5, 0.0, 2.0]);
    // The bias is untouched, byte for byte.
    assert_eq!(t["lin.bias"].2, as_bytes(&[1.0, 2.0, 3.0]));
    assert_eq!(meta["lopper.method"], "magnitude");
    assert_eq!(meta["lopper.sparsity"], "0.5");
    let r: serde_json::Value = serde_json::from_slice(&std::fs::read(&report).unwrap()).unwrap();
    assert_eq!(r["layers"][0]["kept"], 6);
    assert_eq!(r["layers"][0]["sparsity"], 0.5);
    assert_eq!(r["layers"][0]["holdout_rows"], 2);
    assert_eq!(r["settings"]["method"], "magnitude");
    assert!(r["summary"]["mean_rel_error"].as_f64().unwrap() > 0.0);
}

fn as_bytes(v: &[f32]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

#[test]
fn every_method_and_pattern_conforms_and_reports() {
    let dir = Scratch::new("methods");
    let (model, acts) = small_model(&dir);
    for method in ["magnitude", "scaled", "obs", "l0"] {
        for target in [["--sparsity", "0.5"], ["--pattern", "1:2"]] {
            let out =
                dir.path(&format!("{method}-{}.safetensors", target[0].trim_start_matches('-')));
            let rep = dir.path("rep.json");
            let o = lopper(&[
                "prune",
                s(&model),
                "--activations",
                s(&acts),
                target[0],
                target[1],
                "--method",
                method,
                "-o",
                s(&out),
                "--report",
                s(&rep),
                "--quiet",
            ]);
            assert!(o.status.success(), "{method}: {}", stderr(&o));
            let (t, _) = read_st(&out);
            for (name, cols) in [("enc.0.weight", 8), ("enc.1.weight", 6)] {
                let v = as_f32(&t[name].2);
                for row in v.chunks(cols) {
                    // Both targets keep exactly half of every row here.
                    assert_eq!(
                        row.iter().filter(|x| **x != 0.0).count(),
                        cols / 2,
                        "{method} {name}"
                    );
                    if target[0] == "--pattern" {
                        for g in row.chunks(2) {
                            assert!(g.iter().filter(|x| **x != 0.0).count() <= 1);
                        }
                    }
                }
            }
            // Untouched tensors are byte-identical to the input.
            let (orig, _) = read_st(&model);
            for name in ["embed.weight", "enc.0.bias", "norm.weight", "head.weight"] {
                assert_eq!(t[name], orig[name], "{name}");
            }
            let r: serde_json::Value =
                serde_json::from_slice(&std::fs::read(&rep).unwrap()).unwrap();
            assert_eq!(r["layers"].as_array().unwrap().len(), 2);
            assert!((r["summary"]["sparsity"].as_f64().unwrap() - 0.5).abs() < 1e-12);
        }
    }
}

#[test]
fn per_layer_scope_keeps_one_budget() {
    let dir = Scratch::new("layer");
    let (model, acts) = small_model(&dir);
    let out = dir.path("o.safetensors");
    let o = lopper(&[
        "prune",
        s(&model),
        "--activations",
        s(&acts),
        "--sparsity",
        "0.75",
        "--scope",
        "layer",
        "--method",
        "obs",
        "-o",
        s(&out),
        "--quiet",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let (t, _) = read_st(&out);
    let nz = as_f32(&t["enc.0.weight"].2).iter().filter(|x| **x != 0.0).count();
    assert_eq!(nz, 12); // 48 - round(0.75 * 48)
}

/// Run a prune that must fail with exit code 2, a one-line message
/// containing every `needle`, and no output file.
fn fails(dir: &Scratch, args: &[&str], needles: &[&str]) {
    let before = dir.files();
    let o = lopper(args);
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(2), "args {args:?}\nstderr: {err}");
    assert_eq!(err.trim_end().lines().count(), 1, "one line expected: {err}");
    for n in needles {
        assert!(err.contains(n), "{args:?}: message lacks '{n}': {err}");
    }
    assert_eq!(dir.files(), before, "{args:?} left files behind");
}

#[test]
fn bad_inputs_fail_cleanly() {
    let dir = Scratch::new("bad");
    let (model, acts) = small_model(&dir);
    let (m, a) = (s(&model).to_string(), s(&acts).to_string());
    let out = dir.path("out.safetensors");
    let o = s(&out).to_string();
    let base = |extra: &[&str]| -> Vec<String> {
        let mut v: Vec<String> = ["prune", &m, "--activations", &a, "-o", &o, "--quiet"]
            .iter()
            .map(|x| x.to_string())
            .collect();
        v.extend(extra.iter().map(|x| x.to_string()));
        v
    };
    let run = |args: Vec<String>, needles: &[&str]| {
        let r: Vec<&str> = args.iter().map(String::as_str).collect();
        fails(&dir, &r, needles);
    };
    run(base(&["--sparsity", "1.0"]), &["--sparsity", "[0, 1)"]);
    run(base(&["--sparsity", "-0.1"]), &["--sparsity"]);
    run(base(&["--pattern", "4:2"]), &["--pattern", "4:2"]);
    run(base(&["--pattern", "2-4"]), &["--pattern"]);
    run(base(&["--pattern", "2:4"]), &["enc.1.weight", "does not divide", "6"]);
    run(base(&["--sparsity", "0.5", "--pattern", "2:4"]), &["--pattern"]);
    run(base(&["--sparsity", "0.5", "--ridge", "-1"]), &["--ridge"]);
    run(base(&["--sparsity", "0.5", "--holdout", "1.5"]), &["--holdout"]);
    run(base(&["--sparsity", "0.5", "--skip", "*"]), &["no prunable tensor"]);
    run(base(&["--sparsity", "0.5", "--only", "nothing.*"]), &["--only", "nothing.*"]);

    // Output path equal to an input.
    let mut v = base(&["--sparsity", "0.5"]);
    v[5] = m.clone();
    run(v, &["refusing to overwrite", "model.safetensors"]);
    let mut v = base(&["--sparsity", "0.5", "--report"]);
    v.push(a.clone());
    run(v, &["--report", "refusing to overwrite"]);

    // Missing activation tensor; width matching d_out; width matching neither.
    let a2 = dir.path("a2.safetensors");
    write_st(&a2, &[f32s("enc.0.weight", &[40, 8], &values(320, 6))]);
    let mut v = base(&["--sparsity", "0.5"]);
    v[3] = s(&a2).into();
    run(v, &["a2.safetensors", "enc.1.weight"]);
    write_st(
        &a2,
        &[
            f32s("enc.0.weight", &[40, 6], &values(240, 6)),
            f32s("enc.1.weight", &[40, 6], &values(240, 7)),
        ],
    );
    let mut v = base(&["--sparsity", "0.5"]);
    v[3] = s(&a2).into();
    run(v, &["enc.0.weight", "d_out=6", "d_in=8"]);
    write_st(
        &a2,
        &[
            f32s("enc.0.weight", &[40, 5], &values(200, 6)),
            f32s("enc.1.weight", &[40, 6], &values(240, 7)),
        ],
    );
    let mut v = base(&["--sparsity", "0.5"]);
    v[3] = s(&a2).into();
    run(v, &["enc.0.weight", "neither"]);

    // NaN in weights, Inf in activations.
    let bad_model = dir.path("nan.safetensors");
    let mut w = values(48, 2);
    w[17] = f32::NAN;
    write_st(&bad_model, &[f32s("enc.0.weight", &[6, 8], &w)]);
    let mut v = base(&["--sparsity", "0.5", "--only", "enc.0.weight"]);
    v[1] = s(&bad_model).into();
    run(v, &["nan.safetensors", "enc.0.weight", "NaN"]);
    let mut x = values(320, 6);
    x[33] = f32::INFINITY;
    write_st(
        &a2,
        &[f32s("enc.0.weight", &[40, 8], &x), f32s("enc.1.weight", &[40, 6], &values(240, 7))],
    );
    let mut v = base(&["--sparsity", "0.5"]);
    v[3] = s(&a2).into();
    run(v, &["a2.safetensors", "enc.0.weight", "nf"]);
}

#[test]
fn broken_files_fail_cleanly() {
    let dir = Scratch::new("broken");
    let (model, acts) = small_model(&dir);
    let out = dir.path("out.safetensors");
    let good = std::fs::read(&model).unwrap();
    let hlen = u64::from_le_bytes(good[..8].try_into().unwrap()) as usize;
    let header = String::from_utf8(good[8..8 + hlen].to_vec()).unwrap();
    let with_header = |h: &str, data: &[u8]| {
        let mut h = h.as_bytes().to_vec();
        while h.len() % 8 != 0 {
            h.push(b' ');
        }
        let mut b = (h.len() as u64).to_le_bytes().to_vec();
        b.extend(h);
        b.extend(data);
        b
    };
    let data = &good[8 + hlen..];
    let cases: Vec<(&str, Vec<u8>, Vec<&str>)> = vec![
        ("truncated", good[..good.len() - 10].to_vec(), vec!["truncated"]),
        ("tiny", vec![1, 2, 3], vec!["truncated"]),
        ("text", b"this is a plain text file, not safetensors at all....".to_vec(), vec![]),
        ("notjson", with_header("{not json", data), vec!["JSON"]),
        ("dtype", with_header(&header.replacen("\"F32\"", "\"Q7\"", 1), data), vec!["Q7"]),
        (
            "outside",
            with_header(
                r#"{"a.weight":{"dtype":"F32","shape":[2,2],"data_offsets":[0,16]}}"#,
                &[0u8; 8],
            ),
            vec!["a.weight"],
        ),
        (
            "overlap",
            with_header(
                r#"{"a.weight":{"dtype":"F32","shape":[2,2],"data_offsets":[0,16]},"b.weight":{"dtype":"F32","shape":[2,2],"data_offsets":[8,24]}}"#,
                &[0u8; 24],
            ),
            vec!["weight"],
        ),
    ];
    for (tag, bytes, needles) in cases {
        let p = dir.path(&format!("{tag}.safetensors"));
        std::fs::write(&p, bytes).unwrap();
        let mut n = needles.clone();
        n.push(p.file_name().unwrap().to_str().unwrap());
        fails(
            &dir,
            &["prune", s(&p), "--activations", s(&acts), "--sparsity", "0.5", "-o", s(&out)],
            &n,
        );
        fails(&dir, &["inspect", s(&p)], &n);
        std::fs::remove_file(&p).unwrap();
    }
    fails(
        &dir,
        &[
            "prune",
            s(&dir.path("missing.safetensors")),
            "--activations",
            s(&acts),
            "--sparsity",
            "0.5",
            "-o",
            s(&out),
        ],
        &["missing.safetensors"],
    );
    fails(
        &dir,
        &[
            "prune",
            s(&model),
            "--activations",
            s(&dir.path("nope.safetensors")),
            "--sparsity",
            "0.5",
            "-o",
            s(&out),
        ],
        &["nope.safetensors"],
    );
}

#[test]
fn model_directory_with_shards_is_mirrored() {
    let dir = Scratch::new("shards");
    let src = dir.path("model");
    std::fs::create_dir(&src).unwrap();
    write_st(
        &src.join("model-00001-of-00002.safetensors"),
        &[f32s("enc.0.weight", &[6, 8], &values(48, 2))],
    );
    write_st(
        &src.join("model-00002-of-00002.safetensors"),
        &[f32s("enc.1.weight", &[4, 6], &values(24, 4)), f32s("enc.1.bias", &[4], &values(4, 5))],
    );
    let index = serde_json::json!({
        "metadata": {"total_size": 304},
        "weight_map": {
            "enc.0.weight": "model-00001-of-00002.safetensors",
            "enc.1.weight": "model-00002-of-00002.safetensors",
            "enc.1.bias": "model-00002-of-00002.safetensors"
        }
    });
    std::fs::write(src.join("model.safetensors.index.json"), index.to_string()).unwrap();
    std::fs::write(src.join("config.json"), b"{\"hidden\": 8}\n").unwrap();
    let (_, acts) = small_model(&dir);
    let out = dir.path("pruned");
    let o = lopper(&[
        "prune",
        s(&src),
        "--activations",
        s(&acts),
        "--sparsity",
        "0.5",
        "-o",
        s(&out),
        "--quiet",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    for f in ["config.json", "model.safetensors.index.json"] {
        assert_eq!(std::fs::read(src.join(f)).unwrap(), std::fs::read(out.join(f)).unwrap(), "{f}");
    }
    let (t2, _) = read_st(&out.join("model-00002-of-00002.safetensors"));
    let (o2, _) = read_st(&src.join("model-00002-of-00002.safetensors"));
    assert_eq!(t2["enc.1.bias"], o2["enc.1.bias"]);
    assert_eq!(as_f32(&t2["enc.1.weight"].2).iter().filter(|x| **x == 0.0).count(), 12);
    // Pruning into the model's own directory is refused.
    fails(
        &dir,
        &["prune", s(&src), "--activations", s(&acts), "--sparsity", "0.5", "-o", s(&src)],
        &["refusing"],
    );
}

#[test]
fn half_precision_in_and_out() {
    let dir = Scratch::new("half");
    for (dtype, make) in [("F16", f16s as fn(&str, &[usize], &[f32]) -> T), ("BF16", bf16s)] {
        let model = dir.path(&format!("{dtype}.safetensors"));
        write_st(
            &model,
            &[
                make("enc.0.weight", &[6, 8], &values(48, 2)),
                make("enc.0.bias", &[6], &values(6, 3)),
            ],
        );
        let acts = dir.path("acts16.safetensors");
        write_st(&acts, &[make("enc.0.weight", &[40, 8], &values(320, 6))]);
        let out = dir.path(&format!("{dtype}-out.safetensors"));
        let o = lopper(&[
            "prune",
            s(&model),
            "--activations",
            s(&acts),
            "--sparsity",
            "0.5",
            "--method",
            "obs",
            "-o",
            s(&out),
            "--quiet",
        ]);
        assert!(o.status.success(), "{dtype}: {}", stderr(&o));
        let (t, _) = read_st(&out);
        let (orig, _) = read_st(&model);
        assert_eq!(t["enc.0.weight"].0, dtype);
        assert_eq!(t["enc.0.bias"], orig["enc.0.bias"]);
        let nz = t["enc.0.weight"]
            .2
            .chunks(2)
            .filter(|c| u16::from_le_bytes([c[0], c[1]]) & 0x7fff != 0)
            .count();
        assert_eq!(nz, 24, "{dtype}");
    }
}

#[test]
fn ridge_auto_picks_from_the_grid_and_needs_held_out_rows() {
    let dir = Scratch::new("ridge");
    let (model, acts) = small_model(&dir);
    let out = dir.path("o.safetensors");
    let rep = dir.path("r.json");
    let args = |extra: &[&str]| {
        let mut v =
            vec!["prune", s(&model), "--activations", s(&acts), "--sparsity", "0.5", "-o", s(&out)];
        v.extend_from_slice(&["--report", s(&rep), "--quiet"]);
        v.extend_from_slice(extra);
        v.iter().map(|x| x.to_string()).collect::<Vec<_>>()
    };
    let run = |extra: &[&str]| {
        let a = args(extra);
        let a: Vec<&str> = a.iter().map(String::as_str).collect();
        lopper(&a)
    };
    // Default: auto, each layer's alpha from the grid.
    let o = run(&[]);
    assert!(o.status.success(), "{}", stderr(&o));
    let r: serde_json::Value = serde_json::from_slice(&std::fs::read(&rep).unwrap()).unwrap();
    assert_eq!(r["settings"]["ridge"], "auto");
    assert_eq!(r["settings"]["method"], "l0");
    for l in r["layers"].as_array().unwrap() {
        let a = l["ridge_alpha"].as_f64().unwrap();
        assert!([0.01, 0.03, 0.1, 0.3, 1.0].contains(&a), "{a}");
    }
    // Default without held-out rows falls back to 0.01 ...
    let o = run(&["--holdout", "0"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let r: serde_json::Value = serde_json::from_slice(&std::fs::read(&rep).unwrap()).unwrap();
    assert_eq!(r["layers"][0]["ridge_alpha"], 0.01);
    assert_eq!(r["layers"][0]["rel_error_holdout"], serde_json::Value::Null);
    // ... but an explicit auto without them is an input error.
    std::fs::remove_file(&out).unwrap();
    std::fs::remove_file(&rep).unwrap();
    fails(
        &dir,
        &args(&["--holdout", "0", "--ridge", "auto"])
            .iter()
            .map(String::as_str)
            .collect::<Vec<_>>(),
        &["--ridge auto", "held-out"],
    );
    // A fixed alpha is used as given.
    let o = run(&["--ridge", "0.25"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let r: serde_json::Value = serde_json::from_slice(&std::fs::read(&rep).unwrap()).unwrap();
    assert_eq!(r["layers"][1]["ridge_alpha"], 0.25);
}

#[test]
fn trace_records_a_non_increasing_objective_per_layer() {
    let dir = Scratch::new("trace");
    let (model, acts) = small_model(&dir);
    let out = dir.path("o.safetensors");
    let trace = dir.path("t.jsonl");
    let rep = dir.path("r.json");
    let o = lopper(&[
        "prune",
        s(&model),
        "--activations",
        s(&acts),
        "--sparsity",
        "0.6",
        "--method",
        "l0",
        "--ridge",
        "0",
        "-o",
        s(&out),
        "--trace",
        s(&trace),
        "--report",
        s(&rep),
        "--quiet",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let r: serde_json::Value = serde_json::from_slice(&std::fs::read(&rep).unwrap()).unwrap();
    let text = std::fs::read_to_string(&trace).unwrap();
    let lines: Vec<serde_json::Value> =
        text.lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    for layer in r["layers"].as_array().unwrap() {
        let name = layer["name"].as_str().unwrap();
        let f: Vec<f64> = lines
            .iter()
            .filter(|l| l["layer"] == name)
            .map(|l| l["objective"].as_f64().unwrap())
            .collect();
        // One entry for the start plus one per sweep.
        assert_eq!(f.len(), layer["sweeps"].as_u64().unwrap() as usize + 1, "{name}");
        assert!(f.windows(2).all(|p| p[1] <= p[0]), "{name}: {f:?}");
        assert_eq!(f[0], layer["objective_initial"].as_f64().unwrap(), "{name}");
        let last = *f.last().unwrap();
        assert!(
            (last - layer["objective_final"].as_f64().unwrap()).abs() <= 1e-12 * last.max(1.0),
            "{name}"
        );
    }
}

#[test]
fn threads_beyond_the_cpus_are_capped_with_a_note() {
    // More worker threads than cores only slow a compute-bound run down
    // (common practice); lopper uses at most the CPUs it may run on.
    let dir = Scratch::new("threads");
    let (model, acts) = small_model(&dir);
    let (out, report) = (dir.path("out.safetensors"), dir.path("r.json"));
    let cpus = std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1);
    let o = lopper(&[
        "prune",
        s(&model),
        "--activations",
        s(&acts),
        "--sparsity",
        "0.5",
        "--threads",
        "100000",
        "-o",
        s(&out),
        "--report",
        s(&report),
        "-q",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let note = format!("lopper: note: --threads 100000 is more than the {cpus} CPUs here");
    assert!(stderr(&o).starts_with(&note), "{}", stderr(&o));
    let r: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&report).unwrap()).unwrap();
    assert_eq!(r["settings"]["threads"], cpus);
    let o =
        lopper(&["speed", s(&out), "--threads", "100000", "--batch", "1", "--min-time", "0.01"]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(stderr(&o).contains("--threads 100000"), "{}", stderr(&o));
}

#[test]
fn certify_adds_a_bound_under_the_objective() {
    // `--certify` adds lower_bound, certified_gap and rows_proven_optimal to
    // every layer; without it they are absent. The bound is proven in
    // src/solve/certify.rs (tested there against enumeration); here the
    // report must hold it as defined: 0 ≤ lower_bound ≤ objective_final,
    // certified_gap = (objective_final − lower_bound) / objective_final,
    // the share of optimal rows in [0, 1] (null for a per-layer budget).
    let dir = Scratch::new("certify");
    let (model, acts) = small_model(&dir);
    for (target, scope, certify) in [
        (["--sparsity", "0.5"], "row", true),
        (["--sparsity", "0.5"], "layer", true),
        (["--pattern", "1:2"], "row", true),
        (["--sparsity", "0.5"], "row", false),
    ] {
        let out = dir.path("c.safetensors");
        let rep = dir.path("c.json");
        let _ = std::fs::remove_file(&out);
        let _ = std::fs::remove_file(&rep);
        let mut args = vec!["prune", s(&model), "--activations", s(&acts), target[0], target[1]];
        if target[0] == "--sparsity" {
            args.extend_from_slice(&["--scope", scope]);
        }
        args.extend_from_slice(&["-o", s(&out), "--report", s(&rep), "--quiet"]);
        if certify {
            args.push("--certify");
        }
        let o = lopper(&args);
        assert!(o.status.success(), "{target:?} {scope}: {}", stderr(&o));
        let r: serde_json::Value = serde_json::from_slice(&std::fs::read(&rep).unwrap()).unwrap();
        for l in r["layers"].as_array().unwrap() {
            if !certify {
                assert!(l.get("lower_bound").is_none() && l.get("certified_gap").is_none());
                continue;
            }
            let (lb, f) =
                (l["lower_bound"].as_f64().unwrap(), l["objective_final"].as_f64().unwrap());
            assert!(lb >= 0.0 && lb <= f * (1.0 + 1e-9), "{target:?} {scope}: {lb} vs {f}");
            let gap = l["certified_gap"].as_f64().unwrap();
            assert!((gap - (f - lb).max(0.0) / f).abs() <= 1e-12, "{gap}");
            match l["rows_proven_optimal"].as_f64() {
                Some(p) => assert!(scope == "row" && (0.0..=1.0).contains(&p), "{p}"),
                None => assert_eq!(scope, "layer"),
            }
        }
    }
}
