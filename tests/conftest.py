"""Shared test configuration: a deterministic hypothesis profile."""
import os

from hypothesis import HealthCheck, settings

settings.register_profile(
    "longrun",
    derandomize=True,
    deadline=None,
    max_examples=int(os.environ.get("LONGRUN_HYPOTHESIS_EXAMPLES", "60")),
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
    print_blob=True,
)
settings.load_profile("longrun")
