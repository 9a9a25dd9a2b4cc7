//! Interoperability with the reference `safetensors` Python package (PyPI):
//! files it writes are read by lopper, and files lopper writes are read by it
//! with identical names, dtypes, shapes and untouched values.

mod common;
use common::*;

#[test]
fn python_written_file_is_pruned_and_read_back_by_python() {
    let Some(_) = python_with_refs() else { return };
    let dir = Scratch::new("py");
    let model = dir.path("py.safetensors");
    let acts = dir.path("acts.safetensors");
    // Reference writer: safetensors.numpy.save_file (PyPI `safetensors`).
    python(
        r#"
import sys, numpy as np
from safetensors.numpy import save_file
rng = np.random.default_rng(5)
save_file({
    "blk.0.proj.weight": rng.standard_normal((16, 32)).astype(np.float32),
    "blk.0.proj.bias": rng.standard_normal(16).astype(np.float32),
    "blk.1.proj.weight": rng.standard_normal((8, 16)).astype(np.float16),
    "tok_embed.weight": rng.standard_normal((50, 32)).astype(np.float32),
    "step": np.array([7, 8, 9], dtype=np.int64),
}, sys.argv[1], metadata={"origin": "numpy"})
save_file({
    "blk.0.proj.weight": rng.standard_normal((200, 32)).astype(np.float32),
    "blk.1.proj.weight": rng.standard_normal((200, 16)).astype(np.float16),
}, sys.argv[2])
"#,
        &[model.to_str().unwrap(), acts.to_str().unwrap()],
    );
    let o = lopper(&["inspect", model.to_str().unwrap(), "--json"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_str(&stdout(&o)).unwrap();
    let prunable: Vec<&str> = v["tensors"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|t| t["prunable"] == true)
        .map(|t| t["name"].as_str().unwrap())
        .collect();
    assert_eq!(prunable, vec!["blk.0.proj.weight", "blk.1.proj.weight"]);

    let out = dir.path("out.safetensors");
    let o = lopper(&[
        "prune",
        model.to_str().unwrap(),
        "--activations",
        acts.to_str().unwrap(),
        "--sparsity",
        "0.75",
        "--method",
        "obs",
        "-o",
        out.to_str().unwrap(),
        "--quiet",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    // Reference reader: safetensors.safe_open on lopper's output.
    let verdict = python(
        r#"
import sys, numpy as np
from safetensors import safe_open
a = safe_open(sys.argv[1], "np"); b = safe_open(sys.argv[2], "np")
assert sorted(a.keys()) == sorted(b.keys()), (a.keys(), b.keys())
for k in a.keys():
    x, y = a.get_tensor(k), b.get_tensor(k)
    assert x.dtype == y.dtype and x.shape == y.shape, k
    if k.endswith("proj.weight"):
        z = (y == 0).sum(axis=1)
        assert (z == round(0.75 * x.shape[1])).all(), (k, z)
    else:
        assert x.tobytes() == y.tobytes(), k
m = b.metadata()
assert m["origin"] == "numpy" and m["lopper.method"] == "obs", m
print("ok", len(a.keys()))
"#,
        &[model.to_str().unwrap(), out.to_str().unwrap()],
    );
    assert_eq!(verdict.trim(), "ok 5");
}
