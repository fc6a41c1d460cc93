#!/usr/bin/env python3
"""The flow of `tidemark bench` in PyTorch, for a side-by-side speed check.

Same architecture (ActNorm, fixed permutation, affine coupling with a
ReLU MLP conditioner of the given width and depth 2, soft clamp 3), same
initialisation scheme (uniform +-1/sqrt(fan_in), small random output layer),
same batch, same threads, standard-normal data, Adam. Prints one JSON line:
train and score vectors per second.
Usage: bench_pytorch.py DIM HIDDEN LAYERS BATCH THREADS SECONDS
"""
import json
import sys
import time

import torch

from pytorch_flow import flow
from pytorch_flow import nll as flow_nll

dim, hidden, layers, batch, threads = (int(a) for a in sys.argv[1:6])
seconds = float(sys.argv[6])
torch.set_num_threads(threads)
torch.manual_seed(7)


model = flow(dim, hidden, layers, last_scale=0.01)


def nll(x):
    return flow_nll(model, x).mean()


data = torch.randn(batch * 8, dim)
opt = torch.optim.Adam(model.parameters(), lr=1e-4)
steps, start = 0, time.perf_counter()
while time.perf_counter() - start < seconds or steps < 3:
    x = data[(steps % 8) * batch:(steps % 8 + 1) * batch]
    opt.zero_grad(set_to_none=True)
    loss = nll(x)
    loss.backward()
    opt.step()
    steps += 1
train = steps * batch / (time.perf_counter() - start)

passes, start = 0, time.perf_counter()
with torch.no_grad():
    while time.perf_counter() - start < seconds or passes < 2:
        nll(data)
        passes += 1
score = passes * data.shape[0] / (time.perf_counter() - start)
print(json.dumps({"train_samples_per_s": train, "score_samples_per_s": score, "torch": torch.__version__}))
