"""Today's engine against the golden trajectories of the NumPy engine it replaced.

The oracle (tests/golden/*.npz, made by tests/golden/rollouts.py at commit
bcb5d54) holds vector and single rollouts of every task through resets and
autoresets. Every observation, reward, flag and info field must agree to 1e-12. A family
whose defaults changed with a version bump is replayed with the keywords that
give its recorded behaviour (``rollouts.LEGACY_KEYWORDS``).

Where they are not bitwise equal, the order of floating-point operations
changed: the old engine summed the drive's terms and the coupling losses with
BLAS matrix-vector products, the compiled kernels add them in need order, so a
value may differ in its last bit or two (about 1e-16 relative).
"""

import numpy as np
import pytest

from tests.golden import rollouts

CASES = sorted(path.stem.split("__") for path in rollouts.HERE.glob("*.npz"))


def test_every_task_and_variant_has_a_recording():
    families = {rollouts.family(task_id) for task_id in rollouts.needbench.envs.TASK_IDS}
    assert {name for name, _ in CASES} == families
    assert len(CASES) >= 4 * len(families)


@pytest.mark.parametrize(("name", "variant"), CASES, ids=["__".join(c) for c in CASES])
def test_rollout_reproduces_the_recording(name, variant):
    recorded = np.load(rollouts.path(name, variant))
    replayed = rollouts.rollout(rollouts.current_id(name), rollouts.replay_keywords(name, variant))
    # Every recorded field is reproduced; a later field (Forage's position) may be added.
    assert set(recorded.files) <= set(replayed)
    for key in recorded.files:
        old, new = recorded[key], replayed[key]
        assert new.shape == old.shape, key
        if old.dtype.kind == "f":
            np.testing.assert_allclose(new, old, rtol=1e-12, atol=1e-12, err_msg=key)
        else:
            np.testing.assert_array_equal(new, old, err_msg=key)
