"""Seeds and noise streams, normalised in one place.

A run's noise identity is ``numpy.random.SeedSequence(seed, spawn_key=spawn_key)``
(``spawn_key`` is empty for a plain integer seed; a sweep or a user may pass a
spawned child). From it:

* the dynamics stream: the two 64-bit Philox key words of the sequence itself
  (for an integer seed exactly the key of langsim 0.1);
* child streams ``sequence.spawn(k)[i]`` for everything else (see ``STREAMS``):
  the initial state (child 0, as in langsim 0.1), the burn-in (child 1, as
  in langsim 0.1), instrument noise (child 2), rare-event drivers (child 3).

Inside a stream, walker ids and branch ids are part of the Philox counter
(see :mod:`langsim.kernels.noise`), so branches of a splitting run and
particles of any batch draw independent, reproducible noise. A missing seed is
replaced by fresh entropy, reduced to 63 bits so that it can be written back
into a TOML file.
"""
import numpy as np

#: Largest seed accepted: TOML integers are signed 64-bit.
MAX_SEED = 2**63 - 1
#: Child index of each named stream of a run's SeedSequence.
STREAMS = {"initial": 0, "burn-in": 1, "measurement": 2, "rates": 3}


def fresh_seed():
    """A new 63-bit seed from operating-system entropy."""
    return int(np.random.SeedSequence().entropy) & MAX_SEED


def sequence(seed, spawn_key=()):
    """The run's SeedSequence."""
    return np.random.SeedSequence(seed, spawn_key=tuple(spawn_key))


def child(seed, spawn_key, stream):
    """The SeedSequence of a named stream (a key of ``STREAMS``)."""
    index = STREAMS[stream]
    return np.random.SeedSequence(seed, spawn_key=tuple(spawn_key) + (index,))


def _key(ss):
    words = ss.generate_state(2, dtype=np.uint64)
    return int(words[0]), int(words[1])


def kernel_key(seed, spawn_key=()):
    """The two uint64 Philox key words of the dynamics stream."""
    return _key(sequence(seed, spawn_key))


def stream_key(seed, spawn_key, stream):
    """Philox key words of a named child stream."""
    return _key(child(seed, spawn_key, stream))


def initial_rng(seed, spawn_key=()):
    """A numpy Generator for initial positions and velocities (child stream 0)."""
    return np.random.Generator(np.random.Philox(child(seed, spawn_key, "initial")))


def burn_in_key(seed, spawn_key=()):
    """Philox key words of the burn-in, independent of the recorded run's noise (child 1)."""
    return stream_key(seed, spawn_key, "burn-in")


def split_seed(value):
    """(seed, spawn_key) of an integer or a SeedSequence (whose entropy must fit in 63 bits)."""
    if isinstance(value, np.random.SeedSequence):
        return int(value.entropy), tuple(int(k) for k in value.spawn_key)
    return value, ()
