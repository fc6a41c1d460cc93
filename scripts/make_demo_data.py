#!/usr/bin/env python3
"""Make the invented demo data in demo-data/ (fixed seed; rerun to regenerate).

Scenario (invented): a fleet of water pumps of four models streams vibration
recordings; an encoder turns each recording into a 32-d embedding. We have
embeddings of normal operation with the pump model as class label, and
three kinds of trouble to detect:
  unseen_model  - a fifth pump model the encoder never saw in training
  stuck_sensor  - a sensor stuck near its resting output: vectors packed
                  tightly around each model's typical operating point with
                  little recording noise (unusually *low* variance, so plain
                  likelihood rates them as very normal)
  drifted       - normal operation after a slow calibration drift
Needs numpy only.
"""
import json
import os

import numpy as np

D, LATENT, MODELS = 32, 6, 4
rng = np.random.default_rng(20261202)

# A fixed nonlinear "encoder" from a low-dimensional latent state to 32-d.
A = rng.normal(size=(LATENT, D)) / np.sqrt(LATENT)
B = rng.normal(size=(LATENT, D)) / np.sqrt(LATENT)
bias = rng.normal(size=D) * 0.5
centres = rng.normal(size=(MODELS + 1, LATENT)) * 1.6


def encode(z, noise=0.05):
    return np.tanh(z @ A + bias) * 2.0 + 0.3 * np.sin(z @ B) + noise * rng.normal(size=(len(z), D))


def operating(n, models, spread=1.0):
    labels = rng.choice(models, size=n)
    z = centres[labels] + spread * rng.normal(size=(n, LATENT)) * np.array([1.0, 0.8, 0.6, 0.5, 0.4, 0.3])
    return z, labels


out = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "demo-data")
os.makedirs(out, exist_ok=True)

z, labels = operating(4000, MODELS)
np.save(os.path.join(out, "train.npy"), encode(z).astype(np.float32))
np.save(os.path.join(out, "train_labels.npy"), labels.astype(np.int64))

z, labels = operating(1000, MODELS)
np.save(os.path.join(out, "heldout.npy"), encode(z).astype(np.float32))
np.save(os.path.join(out, "heldout_labels.npy"), labels.astype(np.int64))

z, _ = operating(500, [MODELS])
np.save(os.path.join(out, "unseen_model.npy"), encode(z).astype(np.float32))

# A stuck sensor records almost the same signal over and over: the latent
# state barely moves and the recording noise nearly vanishes.
z, _ = operating(500, MODELS, spread=0.08)
np.save(os.path.join(out, "stuck_sensor.npy"), encode(z, noise=0.01).astype(np.float32))

z, _ = operating(500, MODELS)
drift = np.linspace(-1.0, 1.0, D) * 0.35
np.save(os.path.join(out, "drifted.npy"), (encode(z) * 1.1 + drift).astype(np.float32))

# More held-out normal operation, kept apart for calibrating thresholds.
z, _ = operating(500, MODELS)
np.save(os.path.join(out, "calibration.npy"), encode(z).astype(np.float32))

with open(os.path.join(out, "sets.json"), "w") as f:
    json.dump(
        {
            "train": "normal operation, four pump models (labels in train_labels.npy)",
            "heldout": "normal operation, held out from training (labels in heldout_labels.npy)",
            "calibration": "normal operation, held out from training, for calibrating thresholds",
            "unseen_model": "a fifth pump model, never in training",
            "stuck_sensor": "stuck sensor: vectors packed tightly around each model's operating point",
            "drifted": "normal operation after a slow calibration drift",
        },
        f,
        indent=2,
    )
    f.write("\n")
print("wrote", sorted(os.listdir(out)))
