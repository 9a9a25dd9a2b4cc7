"""Sentence embeddings from onnxruntime, the outside reference for lopper's
BERT forward pass: mean pooling of last_hidden_state over the attention mask.

usage: python3 onnx_embed.py MODEL.onnx TOKENIZER.json < sentences.json > embeddings.json
"""
import json
import sys

import numpy as np
import onnxruntime as ort
from tokenizers import Tokenizer


def main() -> None:
    model, tok_path = sys.argv[1], sys.argv[2]
    sentences = json.load(sys.stdin)
    tok = Tokenizer.from_file(tok_path)
    tok.no_padding()
    tok.no_truncation()
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 2
    sess = ort.InferenceSession(model, opts, providers=["CPUExecutionProvider"])
    out = []
    for s in sentences:
        enc = tok.encode(s)
        ids = np.array([enc.ids], dtype=np.int64)
        mask = np.ones_like(ids)
        types = np.zeros_like(ids)
        (hidden,) = sess.run(
            ["last_hidden_state"],
            {"input_ids": ids, "attention_mask": mask, "token_type_ids": types},
        )
        out.append(hidden[0].mean(axis=0).astype(float).tolist())
    json.dump(out, sys.stdout)


if __name__ == "__main__":
    main()
