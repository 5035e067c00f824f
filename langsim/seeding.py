"""Seeds, normalised in one place.

A run's seed is an integer. From it, :class:`numpy.random.SeedSequence` derives
the two 64-bit Philox key words used by the kernels, and a separate child
sequence for drawing initial states. A missing seed is replaced by fresh
entropy, reduced to 63 bits so that it can be written back into a TOML file.
"""
import numpy as np

#: Largest seed accepted: TOML integers are signed 64-bit.
MAX_SEED = 2**63 - 1


def fresh_seed():
    """A new 63-bit seed from operating-system entropy."""
    return int(np.random.SeedSequence().entropy) & MAX_SEED


def kernel_key(seed):
    """The two uint64 Philox key words for ``seed``."""
    words = np.random.SeedSequence(seed).generate_state(2, dtype=np.uint64)
    return int(words[0]), int(words[1])


def initial_rng(seed):
    """A numpy Generator for initial positions and velocities of ``seed``.

    Independent of the kernel's noise: it uses the first child of the seed's
    SeedSequence.
    """
    child = np.random.SeedSequence(seed).spawn(1)[0]
    return np.random.Generator(np.random.Philox(child))


def burn_in_key(seed):
    """Philox key words of the burn-in, independent of the recorded run's noise.

    Uses the second child of the seed's SeedSequence.
    """
    child = np.random.SeedSequence(seed).spawn(2)[1]
    words = child.generate_state(2, dtype=np.uint64)
    return int(words[0]), int(words[1])
