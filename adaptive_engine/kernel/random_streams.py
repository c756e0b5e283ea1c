"""Counter-based random streams for the decision kernel.

Every random decision an adaptive test makes (a random starting theta, randomesque and
Sympson-Hetter draws, progressive weights, pretest picks) is a uniform number computed
from ``(examinee key, position in the test, purpose, item)`` by a SplitMix64-style mixing
function.  That makes the draws

* vectorised: one numpy expression serves a batch of 10,000 examinees;
* reproducible: a live session and the simulated examinee it replays get the same draws
  from the same seed, whatever else was drawn in the same batch;
* resumable: the whole generator state of a session is its key and its position, so a
  session restored from the store continues the same stream.

The true abilities of a simulation's synthetic examinees are drawn with an ordinary
:class:`numpy.random.Generator`; their simulated answers use these streams with their own
purpose (``SIMULATED_ANSWER``), so that an examinee's answers do not depend on how the
run is cut into chunks.
"""

from __future__ import annotations

import numpy as np

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_MASK63 = (1 << 63) - 1

# purposes: each kind of decision draws from its own sub-stream
START_THETA = 1
RANDOMESQUE = 2
SYMPSON_HETTER = 3
PROGRESSIVE = 4
RANDOM_CRITERION = 5
PRETEST = 6
FIRST_ITEM = 7
#: answers of simulated examinees (the simulation harness only; never a test decision)
SIMULATED_ANSWER = 11


def mix(x) -> np.ndarray:
    """SplitMix64 finaliser on uint64 arrays (wrapping arithmetic)."""
    z = np.asarray(x, dtype=np.uint64)
    with np.errstate(over="ignore"):
        z = z + _GOLDEN
        z = (z ^ (z >> np.uint64(30))) * _M1
        z = (z ^ (z >> np.uint64(27))) * _M2
        z = z ^ (z >> np.uint64(31))
    return z


def stream_key(seed) -> np.ndarray:
    """The stream key of an examinee seed (int or array of ints in [0, 2**63))."""
    return mix(np.asarray(seed, dtype=np.uint64))


def examinee_seeds(seed: int, n: int, *, start: int = 0) -> np.ndarray:
    """Seeds of examinees ``start .. start + n - 1`` of a simulation run with ``seed``.

    A live session started with ``seed=examinee_seeds(S, N)[i]`` makes the same random
    decisions as simulated examinee ``i`` of a run with seed ``S``.
    """
    idx = np.arange(start, start + n, dtype=np.uint64)
    with np.errstate(over="ignore"):
        base = mix(np.uint64(seed % (1 << 64))) ^ (idx * _M2)
    return (mix(base) & np.uint64(_MASK63)).astype(np.int64)


_U64 = (1 << 64) - 1
_GOLDEN_INT, _M1_INT, _M2_INT = int(_GOLDEN), int(_M1), int(_M2)
#: Batches up to this size without items draw in Python integers (the same wrapping
#: arithmetic, so the same numbers, without a dozen numpy calls on arrays of one).
SMALL_BATCH = 4


def _mix_int(z: int) -> int:
    """:func:`mix` of one value in [0, 2**64) as a Python integer (arithmetic modulo 2**64)."""
    z = (z + _GOLDEN_INT) & _U64
    z = ((z ^ (z >> 30)) * _M1_INT) & _U64
    z = ((z ^ (z >> 27)) * _M2_INT) & _U64
    return z ^ (z >> 31)


def uniform_one(key: int, position: int, purpose: int) -> float:
    """:func:`uniforms` of one stream key at one position, as a Python float (the same
    integer arithmetic and the same scaling, so the same number)."""
    z = _mix_int(key ^ _mix_int((position * (1 << 20) + purpose) & _U64))
    return (z >> 11) * (1.0 / (1 << 53))


def uniforms(keys, position, purpose: int, item=None) -> np.ndarray:
    """Uniform numbers in [0, 1).

    Parameters
    ----------
    keys : uint64 array, shape (B,)
        Stream keys of the examinees.
    position : int array, shape (B,) or int
        Number of items given so far (the step of the test).
    purpose : int
        Which decision draws (module constants).
    item : int array, shape (B, K), optional
        Item rows, for one draw per (examinee, item).

    Returns
    -------
    array, shape (B,) or (B, K)
    """
    keys = np.asarray(keys, dtype=np.uint64)
    pos = np.asarray(position).astype(np.uint64)
    if item is None and keys.ndim == 1 and keys.size <= SMALL_BATCH:
        pos = np.broadcast_to(pos, keys.shape)
        scale = 1.0 / (1 << 53)
        return np.array([(_mix_int(k ^ _mix_int((p * (1 << 20) + purpose) & _U64)) >> 11) * scale
                         for k, p in zip(keys.tolist(), pos.tolist())], dtype=np.float64)
    with np.errstate(over="ignore"):
        if pos.shape == keys.shape and pos.ndim == 1 and pos.size > 1 and bool(np.all(pos == pos[0])):
            pos = pos[:1]  # one position for every row (a simulated round): its mix once, broadcast
        z = mix(keys ^ mix(pos * np.uint64(1 << 20) + np.uint64(purpose)))
        if item is not None:
            z = mix(z[:, None] ^ mix(np.asarray(item).astype(np.uint64) + np.uint64(0x5851F42D4C957F2D)))
    # 53 high bits -> double in [0, 1)
    return (z >> np.uint64(11)).astype(np.float64) * (1.0 / (1 << 53))
