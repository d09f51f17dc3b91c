"""Parcel classifier: a small tabular network with hand-written backprop (one bug).

An invented scenario: a depot sorts parcels into three handling classes from
weight, volume, fragility and distance, with a one-hidden-layer tanh network
and softmax cross-entropy.  The hand-written backward pass below forgets to
transpose the input matrix in the first layer's weight gradient (it uses the
activations' gradient in the wrong orientation), a classic backprop slip, on a
square layer where the shapes still fit.

Check it: gradcheck-kit check examples/parcel_classifier.py
(the case declares its planted bug, so finding it is the expected outcome: exit 0)
"""
import numpy as np

import gradcheck_kit as gk

rng = np.random.default_rng(11)
N, D, H, K = 40, 4, 4, 3
FEATURES = rng.normal(size=(N, D))
LABELS = np.eye(K)[rng.integers(0, K, N)]


def forward(p):
    hidden = np.tanh(FEATURES @ p["W1"] + p["b1"])
    logits = hidden @ p["W2"] + p["b2"]
    shifted = logits - logits.max(axis=1, keepdims=True)
    log_prob = shifted - np.log(np.exp(shifted).sum(axis=1, keepdims=True))
    return hidden, log_prob


def classifier_cost(p):
    _, log_prob = forward(p)
    return -np.mean(np.sum(LABELS * log_prob, axis=1))


def classifier_gradient(p):
    hidden, log_prob = forward(p)
    d_logits = (np.exp(log_prob) - LABELS) / N
    d_hidden = d_logits @ p["W2"].T * (1 - hidden ** 2)
    return {"W1": (FEATURES.T @ d_hidden).T,    # BUG: transposed (square layer, so it fits)
            "b1": d_hidden.sum(axis=0),
            "W2": hidden.T @ d_logits,
            "b2": d_logits.sum(axis=0)}


START = {"W1": rng.normal(size=(D, H)) * 0.5, "b1": np.zeros(H),
         "W2": rng.normal(size=(H, K)) * 0.5, "b2": np.zeros(K)}
gk.case(gradient=classifier_gradient, params=START, expect_mismatch=True)(classifier_cost)

if __name__ == "__main__":
    print(gk.compare_gradient(classifier_cost, START, classifier_gradient))
