"""Q-network architectures: a ReLU MLP with one output per action, plain or with a dueling head.

Every linear layer is initialised with weights and biases ~ U(-1/sqrt(fan_in), 1/sqrt(fan_in))
drawn from the caller's ``torch.Generator``, layer by layer in input-to-output order (the dueling
head: shared layers, then the value stream, then the advantage stream).
"""

from __future__ import annotations

import itertools

import numpy as np
import torch
from torch import nn

from qlab.validation import require_choice

HEADS = ("plain", "dueling")


def seeded_linear(fan_in: int, fan_out: int, generator: torch.Generator) -> nn.Linear:
    """A linear layer with weights and biases ~ U(-1/sqrt(fan_in), 1/sqrt(fan_in)) drawn from ``generator``."""
    linear = nn.utils.skip_init(nn.Linear, fan_in, fan_out)
    bound = 1.0 / np.sqrt(fan_in)
    with torch.no_grad():
        nn.init.uniform_(linear.weight, -bound, bound, generator=generator)
        nn.init.uniform_(linear.bias, -bound, bound, generator=generator)
    return linear


def build_mlp(widths: list[int], generator: torch.Generator, relu_last: bool = False) -> nn.Sequential:
    """Linear layers between consecutive ``widths`` with ReLUs between them (and after the last if asked)."""
    layers: list[nn.Module] = []
    for fan_in, fan_out in itertools.pairwise(int(w) for w in widths):
        layers += [seeded_linear(fan_in, fan_out, generator), nn.ReLU()]
    return nn.Sequential(*(layers if relu_last else layers[:-1]))


class DuelingNet(nn.Module):
    """Shared ReLU layers feeding a state-value stream V and an advantage stream A (Wang et al. 2016, ICML).

    ``Q(s, a) = V(s) + A(s, a) - mean_a' A(s, a')``, their eq. 9.
    """

    def __init__(self, obs_dim: int, hidden_sizes: list[int], n_actions: int, generator: torch.Generator):
        super().__init__()
        self.shared = build_mlp([obs_dim, *hidden_sizes], generator, relu_last=True)
        width = int(hidden_sizes[-1])
        self.value = seeded_linear(width, 1, generator)
        self.advantage = seeded_linear(width, n_actions, generator)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """Q-values ``(B, n_actions)`` of inputs ``(B, obs_dim)``."""
        h = self.shared(x)
        advantage = self.advantage(h)
        return self.value(h) + advantage - advantage.mean(dim=1, keepdim=True)


def build_qnet(obs_dim: int, hidden_sizes: list[int], n_actions: int, head: str,
               generator: torch.Generator) -> nn.Module:
    """The Q-network: ``head="plain"``: an MLP with one linear output per action; ``"dueling"``: a DuelingNet."""
    if require_choice("head", head, HEADS) == "dueling":
        return DuelingNet(obs_dim, hidden_sizes, n_actions, generator)
    return build_mlp([obs_dim, *hidden_sizes, n_actions], generator)
