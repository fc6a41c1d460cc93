"""The flow of tidemark written in PyTorch, for the side-by-side scripts
(bench_pytorch.py, compare_nll_pytorch.py): ActNorm, a fixed random
permutation, and an affine coupling whose ReLU conditioner (two hidden
layers) outputs a soft-clamped log-scale and a shift."""
import math

import torch


class Layer(torch.nn.Module):
    def __init__(self, dim, hidden, clamp=3.0, last_scale=0.0):
        super().__init__()
        self.d1, self.clamp = dim // 2, clamp
        d2 = dim - self.d1
        self.log_scale = torch.nn.Parameter(torch.zeros(dim))
        self.bias = torch.nn.Parameter(torch.zeros(dim))
        self.register_buffer("perm", torch.randperm(dim))
        self.net = torch.nn.Sequential(
            torch.nn.Linear(self.d1, hidden), torch.nn.ReLU(),
            torch.nn.Linear(hidden, hidden), torch.nn.ReLU(),
            torch.nn.Linear(hidden, 2 * d2))
        for lin in (self.net[0], self.net[2]):
            b = 1.0 / lin.in_features ** 0.5
            torch.nn.init.uniform_(lin.weight, -b, b)
            torch.nn.init.zeros_(lin.bias)
        # Zero (an identity flow) or small random, as tidemark's bench.
        torch.nn.init.uniform_(self.net[4].weight, -last_scale, last_scale)
        torch.nn.init.zeros_(self.net[4].bias)

    def forward(self, x):
        a = x * self.log_scale.exp() + self.bias
        p = a[:, self.perm]
        p1, p2 = p[:, :self.d1], p[:, self.d1:]
        r, t = self.net(p1).chunk(2, dim=1)
        s = self.clamp * torch.tanh(r / self.clamp)
        return torch.cat([p1, p2 * s.exp() + t], 1), self.log_scale.sum() + s.sum(1)


def flow(dim, hidden, layers, last_scale=0.0):
    return torch.nn.ModuleList([Layer(dim, hidden, last_scale=last_scale) for _ in range(layers)])


def nll(model, x):
    """Per-row negative log-likelihood under a standard normal base."""
    dim = x.shape[1]
    logdet = torch.zeros(x.shape[0])
    for layer in model:
        x, ld = layer(x)
        logdet = logdet + ld
    return 0.5 * (x * x).sum(1) + dim * 0.5 * math.log(2 * math.pi) - logdet
