#!/usr/bin/env python3
"""Generate the `pump-monitor` demo model for lopper.

Scenario: a condition monitor for the irrigation pumps of a fruit farm. Each
example is one snapshot of 48 sensor features taken from a centrifugal pump
(pressures, flow, motor electrics, three temperature probes, a 24-band
vibration spectrum, an 8-band acoustic spectrum, ...). The label is one of six
pump states. Features are synthesised from a small latent state (pump load,
suction head, ambient temperature, pump age, mounting resonance and a fault
severity), so channels are correlated, noisy, and a few channels are "loud"
(engineering units with large scale, or occasional sensor glitches).

A small MLP 48 -> 384 -> 384 -> 384 -> 6 (ReLU) is trained on it with a
hand-written Adam in numpy, and the script writes, into
demo-models/pump-monitor/:

  model.safetensors        F32 weights, [d_out, d_in] (y = x W^T + b)
  config.json              description of the network and the data
  calibration.safetensors  F16 inputs of each hidden layer in the dense model
                           on a separate calibration draw, one tensor per layer
                           named like that layer's weight
  eval.safetensors         held-out `features` [M, 48] F32, `labels` [M] I64

Only numpy is needed; safetensors files are written (and read back for the
sanity checks) by hand. Everything is driven by one fixed seed.

Usage: python3 scripts/make_demo.py [--out DIR]
"""

import argparse
import json
import os
import struct
import sys
import time

import numpy as np

SEED = 20240611
HIDDEN = [384, 384, 384]
N_TRAIN = 24000
N_CALIB = 1536
N_EVAL = 3000
EPOCHS = 8
BATCH = 128
LR = 1e-3

LABELS = ["normal", "cavitation", "clogged_filter", "bearing_wear", "dry_run", "stuck_valve"]
CLASS_PRIOR = [0.30, 0.14, 0.14, 0.14, 0.14, 0.14]

PROCESS_FEATURES = [
    "inlet_pressure_kpa",        # 0
    "outlet_pressure_kpa_x10",   # 1  loud: engineering units, ~30-60
    "differential_pressure",     # 2
    "flow_rate",                 # 3
    "motor_current_a",           # 4  loud: amps, ~10-40
    "motor_voltage_dev",         # 5
    "power_factor",              # 6
    "shaft_speed_rpm_x100",      # 7  loud: ~6-15
    "temp_motor_winding",        # 8
    "temp_bearing_housing",      # 9
    "temp_water",                # 10
    "duty_cycle",                # 11
    "filter_dp",                 # 12
    "valve_position_cmd",        # 13
    "reservoir_level",           # 14
    "pressure_ripple",           # 15
]
VIB_BANDS = [f"vibration_band_{i:02d}" for i in range(24)]
ACOUSTIC_BANDS = [f"acoustic_band_{i}" for i in range(8)]
FEATURES = PROCESS_FEATURES + VIB_BANDS + ACOUSTIC_BANDS
N_FEAT = len(FEATURES)
assert N_FEAT == 48
VIB0 = len(PROCESS_FEATURES)
AC0 = VIB0 + 24


# --------------------------------------------------------------------------
# Synthetic data
# --------------------------------------------------------------------------

def sample(rng, n):
    """Draw n (features, labels) pairs from the pump simulator."""
    y = rng.choice(len(LABELS), size=n, p=CLASS_PRIOR)
    fault = y != 0
    # Fault severity: many faults are incipient, so they overlap with normal.
    sev = np.where(fault, 0.22 + 0.78 * rng.beta(2.0, 1.8, size=n), 0.0)
    load = rng.uniform(0.45, 1.0, size=n)          # speed set point
    head = rng.normal(0.0, 1.0, size=n)            # suction head / reservoir
    amb = rng.normal(0.0, 1.0, size=n)             # ambient temperature
    age = rng.uniform(0.0, 1.0, size=n)            # pump age
    reson = rng.normal(0.0, 1.0, size=n)           # mounting resonance
    valve = np.clip(rng.normal(0.75, 0.15, size=n), 0.2, 1.0)  # valve command

    def onehot(k):
        return (y == k) * sev

    cav, clog, bear, dry, stuck = (onehot(k) for k in range(1, 6))
    # Cavitation is more likely to be "seen" when suction head is low.
    cav = cav * (1.0 + 0.3 * np.tanh(-head))

    x = np.zeros((n, N_FEAT))
    nz = lambda s: rng.normal(0.0, s, size=n)

    rpm = 14.5 * load + nz(0.25)
    flow = (load * valve * (1.0 - 0.55 * clog - 0.6 * stuck - 0.95 * dry - 0.12 * cav)
            + 0.05 * head + nz(0.07))
    inlet = 1.0 * head - 1.1 * cav - 1.0 * clog - 0.5 * dry + 0.2 * load + nz(0.45)
    outlet = (30.0 + 22.0 * load ** 2 + 7.0 * stuck - 18.0 * dry - 3.0 * clog
              - 2.0 * cav + 1.0 * head + nz(2.5))
    x[:, 0] = inlet
    x[:, 1] = outlet
    x[:, 2] = (outlet - 30.0) / 6.0 - inlet + nz(0.4)
    x[:, 3] = 3.0 * flow
    current = (9.0 + 26.0 * load ** 2 * (0.45 + 0.55 * flow / np.maximum(load * valve, 0.2))
               + 2.5 * bear + 3.0 * age + nz(1.6))
    x[:, 4] = current
    x[:, 5] = nz(1.0) + 0.3 * amb
    x[:, 6] = 0.85 - 0.25 * dry - 0.05 * stuck + 0.05 * load + nz(0.04)
    x[:, 6] *= 10.0
    x[:, 7] = rpm
    t_wind = 0.8 * amb + 1.2 * load + 0.9 * dry + 0.5 * stuck + 0.4 * age + nz(0.5)
    t_bear = 0.6 * amb + 0.8 * load + 1.6 * bear + 0.4 * dry + 0.3 * age + nz(0.5)
    t_water = 1.0 * amb + 2.0 * dry + 0.3 * stuck + nz(0.5)
    x[:, 8], x[:, 9], x[:, 10] = t_wind, t_bear, t_water
    x[:, 11] = 2.0 * load + nz(0.3)
    x[:, 12] = 0.3 + 2.2 * clog + 0.2 * age + 0.3 * flow + nz(0.45)
    x[:, 13] = 4.0 * valve + nz(0.1)
    x[:, 14] = head + nz(0.3)
    x[:, 15] = 0.8 * cav + 0.6 * bear + 0.3 * stuck + 0.4 * reson + nz(0.5)

    # Vibration spectrum in dB-like units: a base shape that rises with load,
    # the running-speed harmonics, a mounting resonance bump, and fault bands.
    b = np.arange(24)[None, :]
    base = -0.12 * b + 1.5 * load[:, None]
    harm_center = 2.0 + 2.0 * (load[:, None] - 0.45) / 0.55   # bands 2..4
    harmonics = 1.5 * np.exp(-0.5 * ((b - harm_center) / 0.8) ** 2)
    harmonics += 0.7 * np.exp(-0.5 * ((b - 2 * harm_center) / 1.0) ** 2)
    res_center = 7.0 + 1.5 * reson[:, None]
    resonance = 0.8 * np.exp(-0.5 * ((b - res_center) / 1.5) ** 2)
    bearing_bands = 1.6 * bear[:, None] * np.exp(-0.5 * ((b - 11.5) / 2.0) ** 2)
    bearing_bands *= (0.7 + 0.6 * age[:, None])
    cav_bands = 1.5 * cav[:, None] * (b >= 15) * (1.0 + 0.02 * (b - 15))
    dry_bands = 0.8 * dry[:, None] * np.exp(-0.5 * ((b - 5.0) / 3.0) ** 2)
    stuck_bands = 0.5 * stuck[:, None] * np.exp(-0.5 * ((b - 1.0) / 1.5) ** 2)
    common = rng.normal(0.0, 0.35, size=(n, 1))           # gain drift, shared
    vib = (base + harmonics + resonance + bearing_bands + cav_bands + dry_bands
           + stuck_bands + common + rng.normal(0.0, 0.45, size=(n, 24)))
    x[:, VIB0:VIB0 + 24] = vib

    # Acoustic spectrum: cavitation crackles in the high bands, dry running
    # whines in the middle ones, a stuck valve hisses at the top.
    a = np.arange(8)[None, :]
    ac = 0.5 * load[:, None] - 0.1 * a + 0.3 * amb[:, None] * (a < 2)
    ac = ac + 1.4 * cav[:, None] * (a >= 5) + 0.9 * dry[:, None] * ((a >= 2) & (a <= 4))
    ac = ac + 0.9 * stuck[:, None] * (a == 7) + 0.5 * bear[:, None] * (a == 3)
    ac = ac + rng.normal(0.0, 0.2, size=(n, 1)) + rng.normal(0.0, 0.5, size=(n, 8))
    x[:, AC0:AC0 + 8] = ac

    # Loud glitch channels: EMI on the top vibration band, wind gusts on the
    # lowest acoustic band. Rare but big.
    glitch = rng.random(n) < 0.03
    x[glitch, VIB0 + 23] += rng.uniform(15.0, 40.0, size=glitch.sum())
    gust = rng.random(n) < 0.04
    x[gust, AC0 + 0] += rng.uniform(10.0, 30.0, size=gust.sum())
    return x.astype(np.float32), y.astype(np.int64)


# --------------------------------------------------------------------------
# MLP + Adam
# --------------------------------------------------------------------------

def init_params(rng):
    sizes = [N_FEAT] + HIDDEN + [len(LABELS)]
    params = []
    for d_in, d_out in zip(sizes[:-1], sizes[1:]):
        w = rng.normal(0.0, np.sqrt(2.0 / d_in), size=(d_out, d_in)).astype(np.float32)
        params += [w, np.zeros(d_out, np.float32)]
    return params


def forward(params, x):
    """Return the list of inputs to each linear layer and the logits."""
    inputs = []
    h = x
    n_layers = len(params) // 2
    for i in range(n_layers):
        inputs.append(h)
        z = h @ params[2 * i].T + params[2 * i + 1]
        h = np.maximum(z, 0.0) if i < n_layers - 1 else z
    return inputs, h


def loss_and_grads(params, x, y):
    inputs, logits = forward(params, x)
    n = x.shape[0]
    z = logits - logits.max(axis=1, keepdims=True)
    p = np.exp(z)
    p /= p.sum(axis=1, keepdims=True)
    loss = -np.log(p[np.arange(n), y] + 1e-12).mean()
    g = p
    g[np.arange(n), y] -= 1.0
    g /= n
    grads = [None] * len(params)
    for i in reversed(range(len(params) // 2)):
        grads[2 * i] = g.T @ inputs[i]
        grads[2 * i + 1] = g.sum(axis=0)
        if i > 0:
            g = (g @ params[2 * i]) * (inputs[i] > 0)
    return loss, grads


def train(rng, x, y):
    params = init_params(rng)
    m = [np.zeros_like(p) for p in params]
    v = [np.zeros_like(p) for p in params]
    b1, b2, eps, wd = 0.9, 0.999, 1e-8, 1e-4
    step = 0
    n = x.shape[0]
    steps_total = EPOCHS * (n // BATCH)
    for epoch in range(EPOCHS):
        order = rng.permutation(n)
        losses = []
        for s in range(n // BATCH):
            idx = order[s * BATCH:(s + 1) * BATCH]
            loss, grads = loss_and_grads(params, x[idx], y[idx])
            losses.append(loss)
            step += 1
            lr = LR * 0.5 * (1.0 + np.cos(np.pi * step / steps_total))  # cosine decay
            for p, g, mi, vi in zip(params, grads, m, v):
                if p.ndim == 2:
                    g = g + wd * p
                mi *= b1
                mi += (1 - b1) * g
                vi *= b2
                vi += (1 - b2) * g * g
                mhat = mi / (1 - b1 ** step)
                vhat = vi / (1 - b2 ** step)
                p -= (lr * mhat / (np.sqrt(vhat) + eps)).astype(np.float32)
        print(f"  epoch {epoch + 1}/{EPOCHS}  loss {np.mean(losses):.4f}")
    return params


def accuracy(params, x, y):
    return float((forward(params, x)[1].argmax(axis=1) == y).mean())


# --------------------------------------------------------------------------
# safetensors, by hand
# --------------------------------------------------------------------------

DTYPES = {"F32": np.dtype("<f4"), "F16": np.dtype("<f2"), "I64": np.dtype("<i8")}


def write_safetensors(path, tensors, metadata=None):
    """tensors: list of (name, array, dtype_name) in file order."""
    header = {}
    blobs = []
    offset = 0
    for name, arr, dt in tensors:
        data = np.ascontiguousarray(arr, dtype=DTYPES[dt]).tobytes()
        header[name] = {"dtype": dt, "shape": list(arr.shape),
                        "data_offsets": [offset, offset + len(data)]}
        blobs.append(data)
        offset += len(data)
    if metadata:
        header["__metadata__"] = metadata
    hbytes = json.dumps(header, separators=(",", ":")).encode("utf-8")
    hbytes += b" " * (-len(hbytes) % 8)   # pad so the data starts 8-byte aligned
    with open(path, "wb") as f:
        f.write(struct.pack("<Q", len(hbytes)))
        f.write(hbytes)
        for blob in blobs:
            f.write(blob)


def read_safetensors(path):
    with open(path, "rb") as f:
        raw = f.read()
    (hlen,) = struct.unpack("<Q", raw[:8])
    header = json.loads(raw[8:8 + hlen])
    base = 8 + hlen
    out = {}
    for name, info in header.items():
        if name == "__metadata__":
            continue
        lo, hi = info["data_offsets"]
        arr = np.frombuffer(raw[base + lo:base + hi], dtype=DTYPES[info["dtype"]])
        out[name] = arr.reshape(info["shape"])
    return out


# --------------------------------------------------------------------------

def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--out", default=os.path.join(os.path.dirname(os.path.abspath(__file__)),
                                                  "..", "demo-models", "pump-monitor"))
    args = ap.parse_args()
    out = os.path.normpath(args.out)
    os.makedirs(out, exist_ok=True)
    t0 = time.time()

    root = np.random.SeedSequence(SEED)
    rng_train, rng_calib, rng_eval, rng_init = (np.random.default_rng(s) for s in root.spawn(4))
    x_train, y_train = sample(rng_train, N_TRAIN)
    x_calib, _ = sample(rng_calib, N_CALIB)
    x_eval, y_eval = sample(rng_eval, N_EVAL)
    print(f"data: train {N_TRAIN}, calibration {N_CALIB}, eval {N_EVAL}; "
          f"class counts (eval) {np.bincount(y_eval, minlength=len(LABELS)).tolist()}")

    print("training MLP " + " -> ".join(map(str, [N_FEAT] + HIDDEN + [len(LABELS)])))
    params = train(rng_init, x_train, y_train)
    train_acc = accuracy(params, x_train, y_train)

    # Weights.
    names = []
    for i in range(len(HIDDEN)):
        names += [f"hidden.{i}.weight", f"hidden.{i}.bias"]
    names += ["head.weight", "head.bias"]
    model_path = os.path.join(out, "model.safetensors")
    write_safetensors(model_path, [(nm, p, "F32") for nm, p in zip(names, params)],
                      {"format": "pt", "producer": "scripts/make_demo.py"})

    # Calibration activations: inputs of each hidden layer in the dense model.
    calib_inputs, _ = forward(params, x_calib)
    calib = []
    for i in range(len(HIDDEN)):
        a = calib_inputs[i]
        if np.abs(a).max() >= 65504:
            sys.exit(f"calibration input of hidden.{i} overflows F16")
        calib.append((f"hidden.{i}.weight", a, "F16"))
    calib_path = os.path.join(out, "calibration.safetensors")
    write_safetensors(calib_path, calib, {"rows": str(N_CALIB),
                                          "what": "inputs of each layer in the dense model"})

    eval_path = os.path.join(out, "eval.safetensors")
    write_safetensors(eval_path, [("features", x_eval, "F32"), ("labels", y_eval, "I64")])

    config = {
        "name": "pump-monitor",
        "task": "classify the state of an irrigation pump from one sensor snapshot",
        "architecture": "mlp",
        "activation": "relu",
        "layer_sizes": [N_FEAT] + HIDDEN + [len(LABELS)],
        "layers": [{"weight": f"hidden.{i}.weight", "bias": f"hidden.{i}.bias",
                    "d_in": ([N_FEAT] + HIDDEN)[i], "d_out": HIDDEN[i],
                    "activation_after": "relu"} for i in range(len(HIDDEN))]
                  + [{"weight": "head.weight", "bias": "head.bias", "d_in": HIDDEN[-1],
                      "d_out": len(LABELS), "activation_after": None}],
        "weight_layout": "[d_out, d_in], y = x W^T + b",
        "labels": LABELS,
        "features": FEATURES,
        "loud_features": ["outlet_pressure_kpa_x10", "motor_current_a", "shaft_speed_rpm_x100",
                          "vibration_band_23 (EMI glitches)", "acoustic_band_0 (wind gusts)"],
        "generator": {"script": "scripts/make_demo.py", "seed": SEED,
                      "train_rows": N_TRAIN, "calibration_rows": N_CALIB,
                      "eval_rows": N_EVAL, "epochs": EPOCHS, "batch": BATCH,
                      "optimizer": "adam", "learning_rate": LR},
    }
    with open(os.path.join(out, "config.json"), "w") as f:
        json.dump(config, f, indent=2)
        f.write("\n")

    # ---- Sanity checks: read everything back from disk. ----
    m = read_safetensors(model_path)
    c = read_safetensors(calib_path)
    e = read_safetensors(eval_path)
    loaded = [m[nm] for nm in names]
    for p, q in zip(params, loaded):
        assert p.dtype == q.dtype and np.array_equal(p, q), "weights did not round-trip"
    assert np.array_equal(e["features"], x_eval) and np.array_equal(e["labels"], y_eval)
    # Recompute the hidden-layer inputs from the saved float32 weights and
    # compare with the stored F16 activations: they must agree to F16 rounding
    # (relative 2^-11, plus the F16 subnormal spacing near zero).
    recomputed, _ = forward(loaded, x_calib)
    for i in range(len(HIDDEN)):
        stored = c[f"hidden.{i}.weight"].astype(np.float32)
        ref = recomputed[i]
        assert stored.shape == ref.shape == (N_CALIB, ([N_FEAT] + HIDDEN)[i])
        err = np.abs(stored - ref)
        tol = 2.0 ** -11 * np.abs(ref) * (1 + 1e-4) + 2.0 ** -25
        if not np.all(err <= tol):
            sys.exit(f"sanity check failed for hidden.{i}: max excess {(err - tol).max():.3g}")
        rel = np.linalg.norm(stored - ref) / np.linalg.norm(ref)
        print(f"  check hidden.{i}: {stored.shape[0]}x{stored.shape[1]} activations match "
              f"(rel err {rel:.2e}, max |a| {np.abs(ref).max():.1f}, "
              f"zeros {np.mean(ref == 0):.2f})")
    acc = accuracy(loaded, e["features"], e["labels"])

    print(f"wrote {out}/ in {time.time() - t0:.1f}s")
    for fn in ["model.safetensors", "calibration.safetensors", "eval.safetensors", "config.json"]:
        print(f"  {fn:26s} {os.path.getsize(os.path.join(out, fn)) / 1e6:7.2f} MB")
    print(f"train accuracy {train_acc:.4f}")
    print(f"dense eval accuracy {acc:.4f} ({N_EVAL} held-out examples)")


if __name__ == "__main__":
    main()
