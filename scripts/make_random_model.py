#!/usr/bin/env python3
"""Write a random-weight decoder model of a realistic shape, for benchmarks
and tests: safetensors weights (sharded like published checkpoints when
large), config.json and a word-level tokenizer.json, in the Hugging Face
layout lopper reads (src/arch/llama.rs, src/arch/gpt2.rs, src/tokenize.rs).

    python3 scripts/make_random_model.py --family llama --size 0.4b OUT_DIR
    python3 scripts/make_random_model.py --family gpt2 --size tiny OUT_DIR \\
        --dtype bf16 --shard-mb 0.4 --seed 3

The weights are random, so the model predicts nothing; it has the shapes,
dtypes, file layout and activation scales of a trained model, which is what
forward-pass timing and pruning plumbing need. No weights are committed to
the repository; write them under target/ or /tmp.

Only numpy is needed. The safetensors format is written by hand from its
public description: an 8-byte little-endian header length, a JSON header
(name -> dtype, shape, data_offsets; "__metadata__" -> strings) padded with
spaces to a multiple of 8 bytes, then the raw little-endian tensor data.

Memory: the tensor list and every header are computed from the shapes
alone; each tensor is then drawn and written in chunks of at most
CHUNK_ELEMS values, so peak memory is a few hundred MB whatever the model
size (an 8B bf16 model fits on a small machine).
"""

import argparse
import json
import os
import struct
import sys
import time

import numpy as np

# Shapes of common Llama-style decoders (hidden, intermediate, layers,
# attention heads, key/value heads). Common practice, from memory, not from
# any one published config: ~0.4B and ~1B follow the small open Llama-style
# models (the 1B row is the TinyLlama-like 2048/5632/22/32/4), 3B and 8B the
# Llama 3.2 3B / Llama 3 8B widths. The vocabulary is 32000 (the Llama 2
# tokenizer's size) for every size, to keep the embedding moderate.
LLAMA_SIZES = {
    "tiny": dict(hidden=64, intermediate=176, layers=2, heads=4, kv_heads=2, vocab=4096),
    "0.4b": dict(hidden=1024, intermediate=2816, layers=24, heads=16, kv_heads=8, vocab=32000),
    "1b": dict(hidden=2048, intermediate=5632, layers=22, heads=32, kv_heads=4, vocab=32000),
    "3b": dict(hidden=3072, intermediate=8192, layers=28, heads=24, kv_heads=8, vocab=32000),
    "8b": dict(hidden=4096, intermediate=14336, layers=32, heads=32, kv_heads=8, vocab=32000),
}

# GPT-2 shapes (n_embd, n_layer, n_head) of the published small / medium /
# large / xl configs, from memory; vocabulary 50257, 1024 positions, MLP
# 4 x n_embd. The parameter-count names are aliases for the nearest one.
GPT2_SIZES = {
    "tiny": dict(hidden=64, layers=2, heads=4, vocab=4096, positions=1024),
    "small": dict(hidden=768, layers=12, heads=12, vocab=50257, positions=1024),
    "medium": dict(hidden=1024, layers=24, heads=16, vocab=50257, positions=1024),
    "large": dict(hidden=1280, layers=36, heads=20, vocab=50257, positions=1024),
    "xl": dict(hidden=1600, layers=48, heads=25, vocab=50257, positions=1024),
}
GPT2_ALIASES = {"0.1b": "small", "0.4b": "medium", "0.8b": "large", "1.5b": "xl"}

DTYPES = {"bf16": ("BF16", 2, "bfloat16"), "f16": ("F16", 2, "float16"), "f32": ("F32", 4, "float32")}

# Values drawn and converted at a time (64 MB of f32).
CHUNK_ELEMS = 1 << 24


class Spec:
    """One tensor to write: name, shape, and how to draw it.

    kind: "normal" N(0, std); "gain" 1 + N(0, std) (norm gains near 1);
    "zero" for zeros.
    """

    def __init__(self, name, shape, kind, std=0.0):
        self.name, self.shape, self.kind, self.std = name, tuple(shape), kind, std

    def numel(self):
        n = 1
        for d in self.shape:
            n *= d
        return n


def llama_model(a):
    s = dict(LLAMA_SIZES[a.size])
    for k in ("hidden", "intermediate", "layers", "heads", "kv_heads", "vocab"):
        if getattr(a, k) is not None:
            s[k] = getattr(a, k)
    d, heads, kv = s["hidden"], s["heads"], s["kv_heads"]
    if d % heads or heads % kv:
        sys.exit(f"error: hidden {d} must be a multiple of heads {heads}, and heads of kv-heads {kv}")
    hd = d // heads
    if hd % 2:
        sys.exit(f"error: head width {hd} must be even (rotary embeddings)")
    # Trained-like scales: N(0, std) weights (initializer_range 0.02 in the
    # published configs; the tiny test model uses 0.1 so that its 64-wide
    # products keep activations of order one), gains near 1.
    std = a.init_std if a.init_std is not None else (0.1 if a.size == "tiny" else 0.02)
    out_std = std / (2 * s["layers"]) ** 0.5  # residual-branch outputs, as GPT-2 scales them
    t = [Spec("model.embed_tokens.weight", (s["vocab"], d), "normal", std)]
    for i in range(s["layers"]):
        p = f"model.layers.{i}"
        t += [
            Spec(f"{p}.input_layernorm.weight", (d,), "gain", 0.02),
            Spec(f"{p}.self_attn.q_proj.weight", (heads * hd, d), "normal", std),
            Spec(f"{p}.self_attn.k_proj.weight", (kv * hd, d), "normal", std),
            Spec(f"{p}.self_attn.v_proj.weight", (kv * hd, d), "normal", std),
            Spec(f"{p}.self_attn.o_proj.weight", (d, heads * hd), "normal", out_std),
            Spec(f"{p}.post_attention_layernorm.weight", (d,), "gain", 0.02),
            Spec(f"{p}.mlp.gate_proj.weight", (s["intermediate"], d), "normal", std),
            Spec(f"{p}.mlp.up_proj.weight", (s["intermediate"], d), "normal", std),
            Spec(f"{p}.mlp.down_proj.weight", (d, s["intermediate"]), "normal", out_std),
        ]
    t.append(Spec("model.norm.weight", (d,), "gain", 0.02))
    if not a.tie:
        t.append(Spec("lm_head.weight", (s["vocab"], d), "normal", std))
    config = {
        "architectures": ["LlamaForCausalLM"],
        "model_type": "llama",
        "hidden_size": d,
        "intermediate_size": s["intermediate"],
        "num_hidden_layers": s["layers"],
        "num_attention_heads": heads,
        "num_key_value_heads": kv,
        "head_dim": hd,
        "hidden_act": "silu",
        "vocab_size": s["vocab"],
        "max_position_embeddings": 4096,
        "rms_norm_eps": 1e-5,
        "rope_theta": 10000.0,
        "rope_scaling": None,
        "attention_bias": False,
        "mlp_bias": False,
        "tie_word_embeddings": bool(a.tie),
        "initializer_range": std,
        "bos_token_id": 1,
        "eos_token_id": 2,
        "torch_dtype": DTYPES[a.dtype][2],
    }
    # Llama 2's special tokens at the same ids.
    special = [("<unk>", 0), ("<s>", 1), ("</s>", 2)]
    return t, config, special, s["vocab"]


def gpt2_model(a):
    size = GPT2_ALIASES.get(a.size, a.size)
    if size not in GPT2_SIZES:
        names = ", ".join(list(GPT2_SIZES) + list(GPT2_ALIASES))
        sys.exit(f"error: gpt2 has no size '{a.size}' (sizes: {names})")
    s = dict(GPT2_SIZES[size])
    for k in ("hidden", "layers", "heads", "vocab"):
        if getattr(a, k) is not None:
            s[k] = getattr(a, k)
    if a.kv_heads is not None:
        sys.exit("error: --kv-heads is for llama; GPT-2 has one key/value head per query head")
    d, heads = s["hidden"], s["heads"]
    if d % heads:
        sys.exit(f"error: hidden {d} must be a multiple of heads {heads}")
    inner = a.intermediate if a.intermediate is not None else 4 * d
    std = a.init_std if a.init_std is not None else (0.1 if size == "tiny" else 0.02)
    # GPT-2's own initialisation: N(0, 0.02), the residual projections
    # scaled by 1/sqrt(2 n_layer), positions N(0, 0.01), small biases.
    out_std = std / (2 * s["layers"]) ** 0.5
    t = [
        Spec("wte.weight", (s["vocab"], d), "normal", std),
        Spec("wpe.weight", (s["positions"], d), "normal", std / 2),
    ]
    for i in range(s["layers"]):
        p = f"h.{i}"
        t += [
            Spec(f"{p}.ln_1.weight", (d,), "gain", 0.02),
            Spec(f"{p}.ln_1.bias", (d,), "normal", 0.01),
            # Conv1D weights are stored [d_in, d_out].
            Spec(f"{p}.attn.c_attn.weight", (d, 3 * d), "normal", std),
            Spec(f"{p}.attn.c_attn.bias", (3 * d,), "normal", 0.01),
            Spec(f"{p}.attn.c_proj.weight", (d, d), "normal", out_std),
            Spec(f"{p}.attn.c_proj.bias", (d,), "normal", 0.01),
            Spec(f"{p}.ln_2.weight", (d,), "gain", 0.02),
            Spec(f"{p}.ln_2.bias", (d,), "normal", 0.01),
            Spec(f"{p}.mlp.c_fc.weight", (d, inner), "normal", std),
            Spec(f"{p}.mlp.c_fc.bias", (inner,), "normal", 0.01),
            Spec(f"{p}.mlp.c_proj.weight", (inner, d), "normal", out_std),
            Spec(f"{p}.mlp.c_proj.bias", (d,), "normal", 0.01),
        ]
    t += [Spec("ln_f.weight", (d,), "gain", 0.02), Spec("ln_f.bias", (d,), "normal", 0.01)]
    eot = s["vocab"] - 1
    config = {
        "architectures": ["GPT2LMHeadModel"],
        "model_type": "gpt2",
        "n_embd": d,
        "n_layer": s["layers"],
        "n_head": heads,
        "n_inner": inner,
        "n_positions": s["positions"],
        "n_ctx": s["positions"],
        "vocab_size": s["vocab"],
        "activation_function": "gelu_new",
        "layer_norm_epsilon": 1e-5,
        "initializer_range": std,
        "scale_attn_weights": True,
        "tie_word_embeddings": True,
        "bos_token_id": eot,
        "eos_token_id": eot,
        "torch_dtype": DTYPES[a.dtype][2],
    }
    # GPT-2's one special token, the last id.
    return t, config, [("<|endoftext|>", eot)], s["vocab"]


def word(i):
    """A made-up word for id i: consonant-vowel syllables, i written in base
    100 with at least two digits, so every id gets a distinct word."""
    cons, vows = "bdfghjklmnprstvwxyzc", "aeiou"
    digits = []
    while True:
        digits.append(i % 100)
        i //= 100
        if i == 0 and len(digits) >= 2:
            break
    return "".join(cons[x // 5] + vows[x % 5] for x in reversed(digits))


def tokenizer_json(vocab_size, special):
    """A word-level tokenizer in the open format of the `tokenizers`
    library: whitespace pre-tokenizer, special tokens at their ids, made-up
    words at the other ids."""
    taken = {i: tok for tok, i in special}
    vocab, n = {}, 0
    for i in range(vocab_size):
        if i in taken:
            vocab[taken[i]] = i
        else:
            vocab[word(n)] = i
            n += 1
    added = [
        {"id": i, "content": tok, "single_word": False, "lstrip": False, "rstrip": False,
         "normalized": False, "special": True}
        for tok, i in sorted(special, key=lambda x: x[1])
    ]
    unk = next((tok for tok, _ in special if tok == "<unk>"), special[0][0])
    return {
        "version": "1.0", "truncation": None, "padding": None, "added_tokens": added,
        "normalizer": None, "pre_tokenizer": {"type": "Whitespace"},
        "post_processor": None, "decoder": None,
        "model": {"type": "WordLevel", "vocab": vocab, "unk_token": unk},
    }


def to_bytes(x, dtype):
    """f32 array -> little-endian bytes of `dtype`; bf16 by round to
    nearest, ties to even, on the f32 bit pattern (NaN stays NaN)."""
    if dtype == "f32":
        return x.astype("<f4", copy=False).tobytes()
    if dtype == "f16":
        return x.astype("<f2").tobytes()
    u = x.view(np.uint32)
    nan = np.isnan(x)
    r = (u + (np.uint32(0x7FFF) + ((u >> np.uint32(16)) & np.uint32(1)))) >> np.uint32(16)
    r = r.astype("<u2")
    if nan.any():
        r[nan] = 0x7FC0
    return r.tobytes()


def draw(spec, rng, n):
    if spec.kind == "zero":
        return np.zeros(n, np.float32)
    x = rng.standard_normal(n, dtype=np.float32)
    x *= np.float32(spec.std)
    if spec.kind == "gain":
        x += np.float32(1.0)
    return x


def plan_shards(specs, elem, limit):
    """Greedy split in order, as `transformers` does: a new shard starts
    when the next tensor would take the current one past `limit` bytes."""
    shards, cur, size = [], [], 0
    for s in specs:
        b = s.numel() * elem
        if cur and size + b > limit:
            shards.append(cur)
            cur, size = [], 0
        cur.append(s)
        size += b
    if cur:
        shards.append(cur)
    return shards


def header_bytes(specs, st_dtype, elem, metadata):
    h, off = {"__metadata__": metadata}, 0
    for s in specs:
        n = s.numel() * elem
        h[s.name] = {"dtype": st_dtype, "shape": list(s.shape), "data_offsets": [off, off + n]}
        off += n
    raw = json.dumps(h, separators=(",", ":")).encode()
    raw += b" " * (-len(raw) % 8)
    return struct.pack("<Q", len(raw)) + raw, off


def human(n):
    for unit in ("B", "KB", "MB", "GB"):
        if n < 1000 or unit == "GB":
            return f"{n:.1f} {unit}" if unit != "B" else f"{n} B"
        n /= 1000


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("out", help="output folder (created; files in it are overwritten)")
    ap.add_argument("--family", choices=["llama", "gpt2"], required=True)
    ap.add_argument("--size", default="tiny",
                    help="llama: tiny, 0.4b, 1b, 3b, 8b; gpt2: tiny, small, medium, large, xl "
                         "(or 0.1b, 0.4b, 0.8b, 1.5b)")
    ap.add_argument("--dtype", choices=list(DTYPES), default="bf16")
    ap.add_argument("--shard-mb", type=float, default=2000.0,
                    help="largest shard in MB (10^6 bytes); a larger model is sharded (default 2000)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--layers", type=int)
    ap.add_argument("--hidden", type=int)
    ap.add_argument("--intermediate", type=int, help="MLP width (gpt2: n_inner, default 4 x hidden)")
    ap.add_argument("--heads", type=int)
    ap.add_argument("--kv-heads", type=int, help="llama key/value heads (grouped-query attention)")
    ap.add_argument("--vocab", type=int)
    ap.add_argument("--tie", action="store_true", help="llama: tie lm_head to the embeddings")
    ap.add_argument("--init-std", type=float,
                    help="std of the weight draws (default 0.02; 0.1 for tiny)")
    a = ap.parse_args()
    if a.family == "llama" and a.size not in LLAMA_SIZES:
        sys.exit(f"error: llama has no size '{a.size}' (sizes: {', '.join(LLAMA_SIZES)})")
    if a.shard_mb <= 0:
        sys.exit("error: --shard-mb must be positive")

    specs, config, special, vocab = (llama_model if a.family == "llama" else gpt2_model)(a)
    st_dtype, elem, _ = DTYPES[a.dtype]
    os.makedirs(a.out, exist_ok=True)
    params = sum(s.numel() for s in specs)
    total = params * elem
    shards = plan_shards(specs, elem, int(a.shard_mb * 1e6))
    n = len(shards)
    print(f"{a.family} {a.size}: {params / 1e6:.1f}M parameters, {a.dtype}, {human(total)} "
          f"in {n} shard{'s' if n > 1 else ''} -> {a.out}", flush=True)

    # Stale weight files of an earlier run would make the folder ambiguous.
    for f in os.listdir(a.out):
        if f.endswith(".safetensors") or f.endswith(".safetensors.index.json"):
            os.remove(os.path.join(a.out, f))

    names = ["model.safetensors"] if n == 1 else [
        f"model-{k + 1:05d}-of-{n:05d}.safetensors" for k in range(n)]
    # One generator per tensor, seeded from (seed, tensor position): the
    # values do not depend on the sharding or the chunk size.
    index_of = {s.name: i for i, s in enumerate(specs)}
    start = time.time()
    for k, (fname, part) in enumerate(zip(names, shards)):
        t0 = time.time()
        head, size = header_bytes(part, st_dtype, elem, {"format": "pt"})
        path = os.path.join(a.out, fname)
        with open(path + ".tmp", "wb") as f:
            f.write(head)
            for s in part:
                rng = np.random.default_rng([a.seed, index_of[s.name]])
                left = s.numel()
                while left:
                    m = min(left, CHUNK_ELEMS)
                    f.write(to_bytes(draw(s, rng, m), a.dtype))
                    left -= m
        os.replace(path + ".tmp", path)
        dt = time.time() - t0
        print(f"shard {k + 1}/{n} {fname}: {len(part)} tensors, {human(size)} in {dt:.1f} s",
              flush=True)
    if n > 1:
        index = {
            "metadata": {"total_size": total},
            "weight_map": {s.name: fname for fname, part in zip(names, shards) for s in part},
        }
        with open(os.path.join(a.out, "model.safetensors.index.json"), "w") as f:
            json.dump(index, f, indent=2)
            f.write("\n")
    with open(os.path.join(a.out, "config.json"), "w") as f:
        json.dump(config, f, indent=2)
        f.write("\n")
    with open(os.path.join(a.out, "tokenizer.json"), "w") as f:
        json.dump(tokenizer_json(vocab, special), f, ensure_ascii=False)
    print(f"done in {time.time() - start:.1f} s: {n} weight file{'s' if n > 1 else ''}, "
          f"config.json, tokenizer.json ({vocab} tokens)", flush=True)


if __name__ == "__main__":
    main()
