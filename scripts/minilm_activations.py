#!/usr/bin/env python3
"""Real calibration activations of all-MiniLM-L6-v2 for `lopper prune`.

Runs the BERT sentence encoder (6 layers, hidden 384, intermediate 1536, 12
heads) in plain numpy on two corpora of GENERATED text and records, for each of
its 36 encoder linear layers, the input rows that flowed into that layer, one
row per real (non-padding) token:

  encoder.layer.{l}.attention.self.{query,key,value}.weight  hidden state entering layer l   [rows, 384]
  encoder.layer.{l}.attention.output.dense.weight            concatenated attention context  [rows, 384]
  encoder.layer.{l}.intermediate.dense.weight                post-attention LayerNorm output [rows, 384]
  encoder.layer.{l}.output.dense.weight                      GELU output                     [rows, 1536]

The text is not copied from anywhere: `scripts/corpora.py` builds it from our
own templates and word lists with a fixed seed. Kind A is maintenance-log
entries for the irrigation pumps of a fruit farm, kind B is kitchen prep notes.

Writes, under --out (default target/minilm-acts/):

  acts-A.safetensors            F32 activations on corpus A
  acts-B.safetensors            F32 activations on corpus B
  acts-A-heldout-B.safetensors  row i comes from B when floor((i+1)*0.1) > floor(i*0.1)
                                (i = 9, 19, 29, ...) and from A otherwise, both consumed
                                in order; as many rows as both pools allow. With
                                `lopper prune --holdout 0.1` the held-out error is then
                                measured on text of the other kind.

It also checks the forward pass (see `verify`): erf accuracy, padding
invariance, float32 vs float64, and that sentence embeddings (mean pooling +
L2 norm, the model's output) put paraphrases closer than unrelated sentences.

Needs numpy, safetensors and tokenizers (`python3 -m pip install tokenizers`).

Usage: python3 scripts/minilm_activations.py [--model DIR] [--out DIR]
                                             [--tokens-a N] [--tokens-b N]
"""

import argparse
import json
import math
import os
import random
import sys
import time

import numpy as np
from safetensors.numpy import load_file, save_file
from tokenizers import Tokenizer

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import corpora  # noqa: E402

MAX_LEN = 128
BATCH = 32
SEEDS = {"A": 20261202, "B": 20261203}
HOLDOUT = 0.1
LINEARS = ["attention.self.query", "attention.self.key", "attention.self.value",
           "attention.output.dense", "intermediate.dense", "output.dense"]


def erf(x):
    """erf, Abramowitz & Stegun 7.1.26 (|error| < 1.5e-7); numpy has no erf."""
    s = np.sign(x)
    a = np.abs(x)
    t = 1.0 / (1.0 + 0.3275911 * a)
    y = 1.0 - (((((1.061405429 * t - 1.453152027) * t) + 1.421413741) * t - 0.284496736) * t
               + 0.254829592) * t * np.exp(-a * a)
    return (s * y).astype(x.dtype)


def gelu(x):
    return 0.5 * x * (1.0 + erf(x * np.asarray(1.0 / math.sqrt(2.0), x.dtype)))


def layer_norm(x, w, b, eps):
    mu = x.mean(-1, keepdims=True)
    var = ((x - mu) ** 2).mean(-1, keepdims=True)
    return (x - mu) / np.sqrt(var + eps) * w + b


def bert_forward(P, cfg, ids, mask, capture=None):
    """BERT encoder forward pass.

    P: dict name -> array (weights [d_out, d_in], y = x W^T + b); cfg: config.json.
    ids, mask: int [B, T]; mask is 1 on real tokens, 0 on padding.
    capture: optional callback(layer_weight_name, x [B, T, d_in]) called with
    the input of every linear layer. Returns the last hidden state [B, T, H].
    """
    B, T = ids.shape
    H, nh = cfg["hidden_size"], cfg["num_attention_heads"]
    hd, eps = H // nh, cfg["layer_norm_eps"]
    dt = P["embeddings.word_embeddings.weight"].dtype

    def lin(name, x):
        if capture is not None:
            capture(name + ".weight", x)
        w = P[name + ".weight"]  # 2-D GEMM: much faster than numpy's batched 3-D matmul
        return (x.reshape(-1, x.shape[-1]) @ w.T).reshape(x.shape[:-1] + w.shape[:1]) + P[name + ".bias"]

    e = "embeddings."
    h = (P[e + "word_embeddings.weight"][ids] + P[e + "position_embeddings.weight"][:T][None]
         + P[e + "token_type_embeddings.weight"][0][None, None])
    h = layer_norm(h, P[e + "LayerNorm.weight"], P[e + "LayerNorm.bias"], eps)
    # additive key mask: large negative on padded key positions
    bias = ((1.0 - mask[:, None, None, :].astype(dt)) * np.asarray(-1e9, dt)).astype(dt)
    scale = np.asarray(1.0 / math.sqrt(hd), dt)
    for l in range(cfg["num_hidden_layers"]):
        p = f"encoder.layer.{l}."

        def heads(x):
            return x.reshape(B, T, nh, hd).transpose(0, 2, 1, 3)  # [B, nh, T, hd]

        q = heads(lin(p + "attention.self.query", h))
        k = heads(lin(p + "attention.self.key", h))
        v = heads(lin(p + "attention.self.value", h))
        s = (q @ k.transpose(0, 1, 3, 2)) * scale + bias
        s = np.exp(s - s.max(-1, keepdims=True))
        a = s / s.sum(-1, keepdims=True)
        ctx = (a @ v).transpose(0, 2, 1, 3).reshape(B, T, H)
        h = layer_norm(lin(p + "attention.output.dense", ctx) + h,
                       P[p + "attention.output.LayerNorm.weight"],
                       P[p + "attention.output.LayerNorm.bias"], eps)
        inter = gelu(lin(p + "intermediate.dense", h))
        h = layer_norm(lin(p + "output.dense", inter) + h,
                       P[p + "output.LayerNorm.weight"], P[p + "output.LayerNorm.bias"], eps)
    return h


def pad_batch(encs):
    T = max(len(x) for x in encs)
    ids = np.zeros((len(encs), T), np.int64)
    mask = np.zeros((len(encs), T), np.int64)
    for i, x in enumerate(encs):
        ids[i, :len(x)] = x
        mask[i, :len(x)] = 1
    return ids, mask


def tokenize(tok, texts):
    out = []
    for enc in tok.encode_batch(texts):
        x = enc.ids
        if len(x) > MAX_LEN:  # keep [SEP] at the end
            x = x[:MAX_LEN - 1] + x[-1:]
        out.append(x)
    return out


def embed(P, cfg, tok, texts, batch=BATCH):
    """Sentence embeddings: mean of the last hidden state over real tokens, L2-normalised."""
    encs, outs = tokenize(tok, texts), []
    for i in range(0, len(encs), batch):
        ids, mask = pad_batch(encs[i:i + batch])
        h = bert_forward(P, cfg, ids, mask)
        m = mask[..., None].astype(h.dtype)
        e = (h * m).sum(1) / m.sum(1)
        outs.append(e / np.linalg.norm(e, axis=-1, keepdims=True))
    return np.concatenate(outs)


def layer_names(cfg):
    return [f"encoder.layer.{l}.{n}.weight" for l in range(cfg["num_hidden_layers"]) for n in LINEARS]


def collect(P, cfg, tok, texts):
    """Run the corpus in order; return name -> F32 [real tokens, d_in]."""
    encs = tokenize(tok, texts)
    acc = {n: [] for n in layer_names(cfg)}
    for i in range(0, len(encs), BATCH):
        ids, mask = pad_batch(encs[i:i + BATCH])
        keep = mask.astype(bool)  # row-major: sentence by sentence, token by token
        bert_forward(P, cfg, ids, mask, capture=lambda n, x: acc[n].append(x[keep]))
    return {n: np.ascontiguousarray(np.concatenate(v), dtype=np.float32) for n, v in acc.items()}


def make_corpus(tok, kind, n_tokens):
    gen, texts, count = corpora.sentences(kind, random.Random(SEEDS[kind])), [], 0
    while count < n_tokens:
        t = next(gen)
        texts.append(t)
        count += min(len(tok.encode(t).ids), MAX_LEN)
    return texts, count


def heldout_mix(acts_a, acts_b, frac=HOLDOUT):
    """Interleave: row i from B iff floor((i+1)f) > floor(i f) (lopper's is_holdout)."""
    na = next(iter(acts_a.values())).shape[0]
    nb = next(iter(acts_b.values())).shape[0]
    i = np.arange(na + nb + 1, dtype=np.float64)
    from_b = np.floor((i + 1) * frac) > np.floor(i * frac)
    ca, cb = np.cumsum(~from_b), np.cumsum(from_b)  # pool use after row i
    ok = (ca <= na) & (cb <= nb)
    rows = int(np.argmin(ok)) if not ok.all() else len(i)  # first row that overdraws
    from_b = from_b[:rows]
    out = {}
    for n in acts_a:
        x = np.empty((rows, acts_a[n].shape[1]), np.float32)
        x[~from_b] = acts_a[n][:int((~from_b).sum())]
        x[from_b] = acts_b[n][:int(from_b.sum())]
        out[n] = x
    return out, rows, int(from_b.sum())


PARAPHRASES = [  # our own sentences: (a, paraphrase of a)
    ("The pump at the north orchard lost pressure overnight.",
     "Overnight, the north orchard pump's pressure dropped."),
    ("Chop the onions finely and keep them in the fridge.",
     "Dice the onions small and store them chilled."),
    ("The train to the coast was cancelled because of the storm.",
     "Due to the storm, the coastal train did not run."),
    ("She finished reading the novel in a single afternoon.",
     "In one afternoon she read the whole book."),
    ("Our team won the football match three goals to one.",
     "We beat the other side 3-1 in the soccer game."),
    ("The price of apples rose sharply at the market this week.",
     "Apple prices at the market went up a lot this week."),
    ("Please close the window, it is getting cold in here.",
     "Could you shut the window? The room is becoming chilly."),
    ("The software update fixed the crash when saving files.",
     "After the update, the program no longer crashes on save."),
]


def verify(P, cfg, tok):
    print("verification of the forward pass:")
    xs = np.linspace(-6, 6, 20001)
    err = np.abs(erf(xs) - np.array([math.erf(x) for x in xs])).max()
    print(f"  erf approximation: max |err| on [-6, 6] = {err:.2e}")
    texts = [t for pair in PARAPHRASES for t in pair]
    e32 = embed(P, cfg, tok, texts)  # one padded batch of 16
    alone = np.concatenate([embed(P, cfg, tok, [t]) for t in texts])  # no padding at all
    print(f"  padding invariance: max |emb(batched) - emb(alone)| = {np.abs(e32 - alone).max():.2e}")
    P64 = {k: v.astype(np.float64) if v.dtype == np.float32 else v for k, v in P.items()}
    e64 = embed(P64, cfg, tok, texts)
    print(f"  float32 vs float64 forward: max |diff| = {np.abs(e32 - e64).max():.2e}, "
          f"min cosine = {(e32 * e64).sum(1).min():.7f}")
    print(f"  embedding norms: {np.linalg.norm(e32, axis=1).min():.6f}..{np.linalg.norm(e32, axis=1).max():.6f}")
    C = e32 @ e32.T
    n = len(texts)
    pair = np.array([[i // 2 == j // 2 and i != j for j in range(n)] for i in range(n)])
    other = ~pair & ~np.eye(n, dtype=bool)
    np.fill_diagonal(C, -np.inf)
    nn_ok = sum(pair[i, int(np.argmax(C[i]))] for i in range(n))
    print(f"  cosine paraphrase pairs: mean {C[pair].mean():.3f} min {C[pair].min():.3f}; "
          f"unrelated: mean {C[other].mean():.3f} max {C[other].max():.3f}; "
          f"nearest neighbour is the paraphrase for {nn_ok}/{n}")
    return C[pair].min() > C[other].max()


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--model", default=os.path.expanduser("~/.cache/lopper/all-minilm-l6-v2"))
    ap.add_argument("--out", default="target/minilm-acts")
    ap.add_argument("--tokens-a", type=int, default=4000, help="min real tokens in corpus A")
    ap.add_argument("--tokens-b", type=int, default=4000, help="min real tokens in corpus B")
    args = ap.parse_args()
    t0 = time.time()
    cfg = json.load(open(os.path.join(args.model, "config.json")))
    assert cfg["hidden_act"] == "gelu" and cfg["position_embedding_type"] == "absolute"
    P = load_file(os.path.join(args.model, "model.safetensors"))
    tok = Tokenizer.from_file(os.path.join(args.model, "tokenizer.json"))
    tok.no_padding()
    tok.no_truncation()
    names = layer_names(cfg)
    missing = [n for n in names if n not in P]
    assert not missing, f"missing weights: {missing}"

    ok = verify(P, cfg, tok)
    print(f"  paraphrases all closer than unrelated pairs: {ok}   ({time.time() - t0:.1f}s)")

    os.makedirs(args.out, exist_ok=True)
    acts = {}
    for kind, n_tok in (("A", args.tokens_a), ("B", args.tokens_b)):
        t1 = time.time()
        texts, count = make_corpus(tok, kind, n_tok)
        acts[kind] = collect(P, cfg, tok, texts)
        rows = acts[kind][names[0]].shape[0]
        assert rows == count
        print(f"corpus {kind}: {len(texts)} sentences, {rows} tokens (incl. [CLS]/[SEP]), "
              f"{sum(len(t.split()) for t in texts)} words, forward {time.time() - t1:.1f}s")
        for t in texts[:3]:
            print(f"    {t}")
        save_file(acts[kind], os.path.join(args.out, f"acts-{kind}.safetensors"))
    mix, rows, nb = heldout_mix(acts["A"], acts["B"])
    save_file(mix, os.path.join(args.out, "acts-A-heldout-B.safetensors"))
    print(f"acts-A-heldout-B: {rows} rows = {rows - nb} from A + {nb} from B (every 10th row)")

    print("per-layer shapes (name: A | B | A-heldout-B):")
    for n in names:
        print(f"  {n}: {list(acts['A'][n].shape)} | {list(acts['B'][n].shape)} | {list(mix[n].shape)}")
    for f in ("acts-A", "acts-B", "acts-A-heldout-B"):
        p = os.path.join(args.out, f + ".safetensors")
        print(f"wrote {p} ({os.path.getsize(p) / 2**20:.0f} MiB)")
    print(f"total {time.time() - t0:.1f}s")


if __name__ == "__main__":
    main()
