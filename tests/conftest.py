"""Test settings shared by the whole suite: deterministic hypothesis, one torch thread."""

import os

from hypothesis import HealthCheck, settings

settings.register_profile(
    "ci",
    derandomize=True,
    deadline=None,
    max_examples=30,
    suppress_health_check=[HealthCheck.too_slow],
    print_blob=True,
)
settings.register_profile("dev", deadline=None, max_examples=60)
settings.load_profile(os.environ.get("QLAB_HYPOTHESIS_PROFILE", "ci"))

try:
    import torch

    torch.set_num_threads(1)
except ImportError:  # pragma: no cover - torch is a runtime dependency
    pass
