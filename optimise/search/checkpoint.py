"""Search checkpoints as data that cannot run code: one ``.npz`` of arrays per architecture,
read with ``allow_pickle=False``, holding the population, the archive and a JSON record of
the rest (generation counters, the random generator's state, the hashes of the study and
technology text the run was started with).

Loading rebuilds a fresh NSGA-II object from those arrays, so a resumed run continues bit
for bit where the stopped one was, and a crafted file can at worst be refused as malformed.
"""
from __future__ import annotations

import hashlib
import io
import json
import time
import zipfile
from pathlib import Path

import numpy as np
from pymoo.algorithms.moo.nsga2 import NSGA2
from pymoo.core.population import Population

from ..files.errors import InputError
from ..files.inputs import MAX_TABLE_BYTES, read_input

FORMAT = "stagefront-checkpoint-1"
_POP = ("X", "F", "G", "CV")
_DATA = ("rank", "crowding", "n_gen", "n_iter")


def text_hash(*texts: str) -> str:
    """SHA-256 (hex) of the texts, each length-prefixed, so that two splits never collide."""
    h = hashlib.sha256()
    for t in texts:
        b = t.encode("utf-8")
        h.update(len(b).to_bytes(8, "little") + b)
    return h.hexdigest()


def new_algorithm(problem, population: int, generations: int, seed: int) -> NSGA2:
    algorithm = NSGA2(pop_size=population, eliminate_duplicates=True)
    algorithm.setup(problem, termination=("n_gen", generations), seed=seed, verbose=False)
    return algorithm


def encode(state: dict, inputs_hash: str) -> bytes:
    """The search state (see `nsga.run_search`) as the bytes of an ``.npz`` file."""
    a = state["algorithm"]
    arrays = {f"archive_{k}": np.asarray(v, dtype=float) for k, v in zip("XFG", state["archive"])}
    record = {"format": FORMAT, "inputs_sha256": inputs_hash, "hv": [float(v) for v in state["hv"]],
              "feasible": [int(v) for v in state["feasible"]], "wall": float(state["wall"]),
              "finished": bool(state["finished"]), "initialized": bool(a.is_initialized)}
    if a.is_initialized:
        pop = a.pop
        for k in _POP:
            arrays[f"pop_{k}"] = np.asarray(pop.get(k), dtype=float)
        for k in _DATA:
            arrays[f"data_{k}"] = np.array([np.nan if v is None else v for v in pop.get(k)], dtype=float)
        record.update(n_iter=int(a.n_iter), n_gen=int(a.n_gen), n_eval=int(a.evaluator.n_eval),
                      perc=float(a.termination.perc), rng=a.random_state.bit_generator.state,
                      evaluated=[sorted(i.evaluated) for i in pop])
    arrays["record"] = np.frombuffer(json.dumps(record).encode("utf-8"), dtype=np.uint8)
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    return buf.getvalue()


def decode(data: bytes, problem, population: int, generations: int, seed: int, inputs_hash: str,
           where: str = "checkpoint") -> dict:
    """Rebuild the search state from `encode`'s bytes; InputError when the file is not a
    checkpoint of this format, or was written for other study or technology text."""
    try:
        with np.load(io.BytesIO(data), allow_pickle=False) as z:
            arrays = {k: z[k] for k in z.files}
        if not all(isinstance(v, np.ndarray) and v.dtype != object for v in arrays.values()):
            raise ValueError("an entry is not a plain numeric array")
        record = json.loads(arrays.pop("record").tobytes().decode("utf-8"))
        if not isinstance(record, dict) or record.get("format") != FORMAT:
            raise ValueError("not a stagefront checkpoint")
    except (OSError, EOFError, ValueError, KeyError, TypeError, AttributeError, RecursionError, zipfile.BadZipFile,
            zipfile.LargeZipFile) as exc:  # EOFError: an empty or cut-off file
        raise InputError(where, f"is not a readable stagefront checkpoint ({exc})",
                         hint="start a new run folder; checkpoints are never executed, only read as arrays")
    if record.get("inputs_sha256") != inputs_hash:
        raise InputError(where, "cannot resume: the study or technology file changed since the run started",
                         hint="restore the original files, or start a new run folder")
    try:
        algorithm = new_algorithm(problem, population, generations, seed)
        if record["initialized"]:
            pop = Population.new(**{k: arrays[f"pop_{k}"] for k in _POP})
            for k in _DATA:
                values = arrays[f"data_{k}"]
                if k != "crowding":  # integers, or None where pymoo never set one
                    values = np.array([None if not np.isfinite(v) else int(v) for v in values], dtype=object)
                pop.set(k, values)
            for ind, ev in zip(pop, record["evaluated"], strict=True):
                ind.evaluated = {str(e) for e in ev}
            algorithm.pop = pop
            algorithm.n_iter, algorithm.n_gen = int(record["n_iter"]), int(record["n_gen"])
            algorithm.evaluator.n_eval = int(record["n_eval"])
            algorithm.termination.perc = float(record["perc"])
            algorithm.random_state.bit_generator.state = record["rng"]
            algorithm.is_initialized, algorithm.start_time = True, time.time()
            algorithm.opt = pop[pop.get("rank") == 0]
        archive = tuple(arrays[f"archive_{k}"].reshape(-1, n) for k, n in
                        zip("XFG", (problem.n_var, problem.n_obj, problem.n_ieq_constr)))
        return {"algorithm": algorithm, "archive": archive, "hv": [float(v) for v in record["hv"]],
                "feasible": [int(v) for v in record["feasible"]], "wall": float(record["wall"]),
                "finished": bool(record["finished"])}
    except (KeyError, ValueError, TypeError, AttributeError, IndexError, OverflowError) as exc:
        raise InputError(where, f"is not a consistent stagefront checkpoint ({exc})",
                         hint="start a new run folder")


def load(path: Path, problem, population: int, generations: int, seed: int, inputs_hash: str) -> dict:
    # Read as any file handed in: a regular file below the size limit (never a FIFO or device).
    data = read_input(path, str(path), MAX_TABLE_BYTES, "start a new run folder")
    return decode(data, problem, population, generations, seed, inputs_hash, str(path))
