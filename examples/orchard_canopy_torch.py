"""A PyTorch custom activation with its own backward, checked through torch.autograd.

An invented scenario: an orchard's yield model turns canopy-sensor readings into a
light-use score with a custom activation, the "soft ramp" r(x) = x * sigmoid(x),
written as a torch.autograd.Function with a hand-derived backward
r'(x) = s + x s (1 - s), s = sigmoid(x).  gradient=None makes torch.autograd
differentiate the cost *through that backward*, so the check tests the rule
against numeric derivatives (exit 0 here; edit the backward to see it fail).

Check it: gradcheck-kit check examples/orchard_canopy_torch.py
Needs PyTorch (the README says how to install a CPU build); without it, running this
file says so and exits.
"""
import sys

try:
    import torch
except ImportError:
    if __name__ == "__main__":
        print("skipped: this example needs PyTorch (pip install torch; the README says how to "
              "install a CPU build)")
        sys.exit(0)
    raise

import gradcheck_kit as gk


class SoftRamp(torch.autograd.Function):
    @staticmethod
    def forward(ctx, x):
        s = torch.sigmoid(x)
        ctx.save_for_backward(x, s)
        return x * s

    @staticmethod
    def backward(ctx, g):
        x, s = ctx.saved_tensors
        return g * (s + x * s * (1 - s))


READINGS = torch.tensor([[0.8, 1.9, -0.4], [1.2, 0.3, 0.7], [-0.6, 1.1, 2.4], [0.1, -1.3, 0.9]],
                        dtype=torch.float64)
MEASURED_YIELD = torch.tensor([1.4, 0.9, 2.1, 0.2], dtype=torch.float64)
START = {"weights": torch.tensor([0.6, -0.2, 0.45], dtype=torch.float64),
         "offset": torch.tensor(0.1, dtype=torch.float64)}


@gk.case(params=START)
def yield_cost(p):
    score = SoftRamp.apply(READINGS @ p["weights"] + p["offset"])
    return torch.mean((score - MEASURED_YIELD) ** 2)


if __name__ == "__main__":
    print(gk.compare_gradient(yield_cost, START))
