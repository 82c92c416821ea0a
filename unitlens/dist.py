"""Several processes or machines: torch.distributed under torchrun, and no scheduler of our own.

Launched by torchrun (RANK, WORLD_SIZE, LOCAL_RANK, MASTER_ADDR, MASTER_PORT in the environment),
mining shards the corpus and synthesis shards each layer's units over the ranks; partial results
travel here (merging them is the stage's own job: tally.py for mining). Without those variables `group()` is a world of one: no process group, no store, no
thread, and every helper below does what a single process would.

Ranks meet rarely (at the start of a stage and at its end), and a rank may wait hours at a
meeting point for a slower one, so collectives alone cannot tell "slow" from "dead". Each rank
therefore beats a counter in the rendezvous store from a background thread (`_Pulse`). A peer
whose counter stops moving for UNITLENS_DIST_TIMEOUT seconds (killed, out of memory, its machine
gone), or that records a failure, or that exits before a meeting point, makes every other rank
stop with an error naming it. The same timeout bounds torch's own collectives.

Files: the run folder lies on storage every rank sees; each rank writes only files of its own
(`name-rank{r}of{w}.ext`: checkpoints, per-image rows, synthesis tables) and rank 0 merges them
when the stage ends, so no two machines ever write the same file.
"""
from __future__ import annotations

import atexit
import os
import re
import sys
import threading
import time
import uuid
from datetime import timedelta
from pathlib import Path

import numpy as np
import torch

from .errors import UnitlensError

BEAT_S = 1.0  # how often a rank says it is alive
GRACE_S = 15.0  # after a peer is found dead, time for this rank to stop on its own before a hard exit
DEFAULT_TIMEOUT_S = 300.0
_ENV = ("RANK", "WORLD_SIZE", "MASTER_ADDR", "MASTER_PORT")

_group = None
_device = "cpu"


def launched() -> bool:
    """True under torchrun (or any launcher that sets the env:// variables) with more than one rank."""
    return all(os.environ.get(k) for k in _ENV) and int(os.environ["WORLD_SIZE"]) > 1


def timeout_s() -> float:
    text = os.environ.get("UNITLENS_DIST_TIMEOUT", str(DEFAULT_TIMEOUT_S))
    try:
        value = float(text)
    except ValueError:
        value = -1.0
    if value <= 0:
        raise UnitlensError(f"UNITLENS_DIST_TIMEOUT must be a positive number of seconds, got '{text}'.")
    return value


def group():
    """This process's place in the job: a one-rank Group, or the torchrun job (joined on first use)."""
    global _group
    if _group is None:
        _group = _join() if launched() else Group()
    return _group


def place(model, device: str):
    """Put the network on `device` ('cpu', 'cuda' or 'cuda:N'); feature maps still come back to the CPU.

    Under torchrun, 'cuda' means the GPU numbered LOCAL_RANK, one per process.
    """
    global _device
    text = device.strip().lower()
    if text == "cpu":
        return model
    if not re.fullmatch(r"cuda(:\d+)?", text):
        raise UnitlensError(f"--device takes cpu, cuda or cuda:N, got '{device}'.")
    if not torch.cuda.is_available():
        raise UnitlensError(
            f"--device {device}: CUDA is not available here (torch {torch.__version__}, CUDA build "
            f"{torch.version.cuda or 'none'}, {torch.cuda.device_count()} GPU(s) visible). Run on a machine with an "
            "NVIDIA GPU and a CUDA build of torch, or leave out --device to use the CPU.")
    count = torch.cuda.device_count()
    local = int(os.environ.get("LOCAL_RANK", "0")) if launched() else 0
    index = int(text.split(":")[1]) if ":" in text else local
    if index >= count:
        hint = (f"run at most {count} processes per machine (torchrun --nproc-per-node {count})"
                if ":" not in text and launched() else f"choose cuda:0 to cuda:{count - 1}")
        raise UnitlensError(f"--device {device}: GPU {index} does not exist; this machine has {count}; {hint}.")
    if _group is not None and _device == "cpu" and _group.world > 1:
        raise UnitlensError("place() must come before the first distributed step (the process group is already "
                            "joined without CUDA).")
    torch.cuda.set_device(index)
    model.layers()  # the layer table is measured with CPU tensors, before the weights move
    model.module.to(f"cuda:{index}")
    model.device = _device = f"cuda:{index}"
    return model


class Group:
    """Rank `rank` of `world`. Every rank calls the meeting helpers in the same order."""

    def __init__(self, rank: int = 0, world: int = 1, store=None, timeout: float = DEFAULT_TIMEOUT_S):
        self.rank, self.world, self.store, self.timeout = rank, world, store, timeout
        self._meetings = 0
        self._prefix = f"unitlens/{os.environ.get('TORCHELASTIC_RESTART_COUNT', '0')}"
        self.pulse = _Pulse(self) if world > 1 else None

    @property
    def main(self) -> bool:
        return self.rank == 0

    # -- shards -------------------------------------------------------------------------------
    # Dealt round-robin rather than in contiguous ranges: corpora are usually sorted by folder, and
    # folders differ in image size and decoding cost, so dealing gives every rank the same mix and
    # the ranks finish together. A split depends only on (rank, world), so a resumed rank gets its
    # own work back.
    def shard(self, items):
        """This rank's items: every world-th one from position rank (synthesis: a layer's units)."""
        return items[self.rank::self.world]

    def blocks(self, n: int, block: int):
        """This rank's corpus indices: batches rank, rank + world, ... of the batches of `block`
        images one process would make. Each batch then holds the same images as in one process,
        which keeps scores bit-identical (CPU convolutions round differently with other batch-mates)."""
        return _blocks(self.rank, self.world, n, block)

    def row(self, index: np.ndarray, block: int) -> np.ndarray:
        """Row in this rank's part file of corpus indices `index` (all from `blocks(n, block)`)."""
        return (index // block // self.world) * block + index % block

    def part(self, path: Path, rank: int | None = None) -> Path:
        """The file of rank `rank` (default: this one) standing in for `path`; `path` itself for one rank."""
        if self.world == 1:
            return Path(path)
        path = Path(path)
        return path.with_name(f"{path.stem}-rank{self.rank if rank is None else rank}of{self.world}{path.suffix}")

    def parts(self, path: Path) -> list[Path]:
        return [self.part(path, r) for r in range(self.world)]

    def stray(self, folder: Path, stem: str, suffix: str) -> list[str]:
        """Files `stem*suffix` in `folder` left by a launch with another number of ranks."""
        ours = {self.part(Path(folder) / f"{stem}{suffix}", r).name for r in range(self.world)}
        return sorted(p.name for p in Path(folder).glob(f"{stem}*{suffix}") if p.name not in ours)

    # -- meeting points -----------------------------------------------------------------------
    def check(self, where: str = "") -> None:
        """Raise if another rank has failed or stopped answering."""
        if self.pulse is not None and self.pulse.problem:
            self.pulse.noticed = True
            raise UnitlensError(f"rank {self.rank}{' ' + where if where else ''}: {self.pulse.problem}. This rank "
                                "stops too; fix the cause and run the same command again (each rank resumes "
                                "from its checkpoint).")

    def barrier(self, what: str) -> None:
        """Wait until every rank reaches this point, however long, as long as all are alive."""
        if self.world == 1:
            return
        self._meetings += 1
        key = f"{self._prefix}/meet/{self._meetings}"
        where = f"waiting for the other ranks at {what}"
        self._store(lambda: self.store.add(key, 1), where)
        delay = 0.005
        while self._store(lambda: self.store.add(key, 0), where) < self.world:
            self.check(where)
            gone = [p for p in self.pulse.peers if self._store(lambda p=p: self.store.add(self._key("left", p), 0),
                                                                where)]
            # A peer may add the last count and exit between our two reads: count again first.
            if gone and self._store(lambda: self.store.add(key, 0), where) < self.world:
                raise UnitlensError(f"rank {self.rank} {where}: rank {gone[0]} exited before reaching it "
                                    "(its own output says why). Run the same command again to resume.")
            time.sleep(delay)
            delay = min(delay * 2, 0.25)

    def gather(self, obj, what: str) -> list | None:
        """Rank 0 gets every rank's `obj` in rank order; the others get None."""
        if self.world == 1:
            return [obj]
        import torch.distributed as td

        self.barrier(what)
        out = [None] * self.world if self.main else None
        self._collective(lambda: td.gather_object(obj, out, dst=0), what)
        return out

    def share(self, obj, what: str):
        """Every rank gets rank 0's `obj`."""
        if self.world == 1:
            return obj
        import torch.distributed as td

        self.barrier(what)
        box = [obj if self.main else None]
        self._collective(lambda: td.broadcast_object_list(box, src=0), what)
        return box[0]

    def agree(self, value, what: str) -> None:
        """Raise on every rank unless every rank holds the same `value` (e.g. corpus fingerprints)."""
        if self.world == 1:
            return
        import torch.distributed as td

        self.barrier(what)
        seen = [None] * self.world
        self._collective(lambda: td.all_gather_object(seen, value), what)
        odd = [r for r, v in enumerate(seen) if v != seen[0]]
        if odd:
            raise UnitlensError(f"Rank {odd[0]} sees {what} differently from rank 0. Every rank must run the same "
                                "command and see the same files under the same paths.")

    def check_shared(self, folder: Path) -> None:
        """Raise unless every rank sees the folder rank 0 writes (the run folder must be shared storage)."""
        if self.world == 1:
            return
        folder = Path(folder)
        token = self.share(uuid.uuid4().hex, "the shared-folder check")
        probe = folder / f".unitlens-shared-{token}"
        if self.main:
            probe.write_text(token)
        self.barrier("the shared-folder check")
        deadline = time.monotonic() + 30  # network file systems may cache "no such file" for a while
        while not (ok := probe.is_file()) and time.monotonic() < deadline:
            time.sleep(0.5)
        blind = [r for r, seen in enumerate(self.gather(ok, "the shared-folder check") or []) if not seen]
        if self.main:
            probe.unlink(missing_ok=True)
        blind = self.share(blind, "the shared-folder check")
        if blind:
            raise UnitlensError(
                f"Rank(s) {', '.join(map(str, blind))} cannot see {folder} as rank 0 writes it. Put the run "
                "folder (--out) on storage every rank mounts at the same path.")

    def _key(self, kind: str, rank: int) -> str:
        return f"{self._prefix}/{kind}/{rank}"

    def _store(self, op, where: str):
        try:
            return op()
        except Exception as e:  # noqa: BLE001  (the store's errors are RuntimeError or DistStoreError)
            raise UnitlensError(f"rank {self.rank} {where}: lost contact with the rendezvous store at "
                                f"{os.environ.get('MASTER_ADDR')}:{os.environ.get('MASTER_PORT')} ({e}); rank 0 or "
                                "the launcher has stopped.") from None

    def _collective(self, op, what: str) -> None:
        try:
            op()
        except Exception as e:  # noqa: BLE001  (gloo and nccl raise RuntimeError subclasses)
            self.check(f"exchanging {what}")
            raise UnitlensError(f"rank {self.rank}: exchanging {what} with the other ranks failed ({e}). "
                                "Another rank stopped; its output says why.") from None


class _Pulse(threading.Thread):
    """Beats this rank's counter every BEAT_S and watches the peers' counters and failure notes."""

    def __init__(self, g: Group):
        super().__init__(name="unitlens-pulse", daemon=True)
        self.g, self.problem, self.noticed, self.found = g, None, False, 0.0
        self.peers = [p for p in range(g.world) if p != g.rank]
        self._stop = threading.Event()

    def run(self) -> None:
        g, now = self.g, time.monotonic()
        last = {p: (-1, now) for p in self.peers}
        while not self._stop.wait(BEAT_S):
            if self.problem is None:
                try:
                    g.store.add(g._key("beat", g.rank), 1)
                    for p in self.peers:
                        if g.store.check([g._key("failed", p)]):
                            self.problem = f"rank {p} failed: {g.store.get(g._key('failed', p)).decode()}"
                            break
                        if g.store.add(g._key("left", p), 0):
                            continue
                        n, since = last[p]
                        beat = g.store.add(g._key("beat", p), 0)
                        if beat != n:
                            last[p] = (beat, time.monotonic())
                        elif time.monotonic() - since > g.timeout:
                            self.problem = (f"rank {p} has given no sign of life for {g.timeout:.0f} s (killed, out "
                                            "of memory, or its machine unreachable)")
                            break
                except Exception as e:  # noqa: BLE001
                    self.problem = (f"lost contact with the rendezvous store at {os.environ.get('MASTER_ADDR')}:"
                                    f"{os.environ.get('MASTER_PORT')} ({e}); rank 0 or the launcher has stopped")
                if self.problem:
                    self.found = time.monotonic()
            elif not self.noticed and time.monotonic() - self.found > GRACE_S:
                # the main thread is stuck (in a long forward, or a collective with the dead rank): stop hard;
                # checkpoints are written atomically, so a rerun resumes from the last one
                print(f"Error: rank {g.rank}: {self.problem}. Stopping this rank.", file=sys.stderr, flush=True)
                os._exit(1)

    def stop(self) -> None:
        self._stop.set()


def _join() -> Group:
    import torch.distributed as td

    rank, world = int(os.environ["RANK"]), int(os.environ["WORLD_SIZE"])
    limit = timeout_s()
    backend = "cpu:gloo,cuda:nccl" if _device.startswith("cuda") else "gloo"
    try:
        td.init_process_group(backend, timeout=timedelta(seconds=limit))
    except Exception as e:  # noqa: BLE001
        raise UnitlensError(f"rank {rank} of {world} could not join the others through "
                            f"{os.environ['MASTER_ADDR']}:{os.environ['MASTER_PORT']} within {limit:.0f} s ({e}). "
                            "Check that every rank was started and can reach that address.") from None
    from torch.distributed.distributed_c10d import _get_default_store

    g = Group(rank, world, _get_default_store(), limit)
    g.pulse.start()
    atexit.register(shutdown)
    _excepthook = sys.excepthook

    def hook(kind, value, tb):  # an unexpected crash still tells the others who failed and why
        fail(f"{kind.__name__}: {value}")
        _excepthook(kind, value, tb)

    sys.excepthook = hook
    return g


def fail(message: str) -> None:
    """Record that this rank failed (the others stop and quote `message`). No-op for one process."""
    g = _group
    if g is None or g.world == 1:
        return
    try:
        g.store.set(g._key("failed", g.rank), message[:2000].encode())
    except Exception:  # noqa: BLE001  (the store may be what failed)
        pass


def shutdown() -> None:
    """Leave the job: stop beating, tell the others, close the process group. Safe to call twice."""
    global _group
    g, _group = _group, None
    if g is None or g.world == 1:
        return
    import torch.distributed as td

    g.pulse.stop()
    try:
        g.store.add(g._key("left", g.rank), 1)
    except Exception:  # noqa: BLE001
        pass
    if td.is_initialized() and g.pulse.problem is None:
        td.destroy_process_group()


# -- merging per-image rows ------------------------------------------------------------------

def assemble_rows(g: Group, path: Path, rows: int, block: int) -> None:
    """Deal the ranks' part files of per-image rows (shards from `Group.blocks`) back into corpus
    order, as one .npy at `path`; written sequentially, one batch at a time."""
    if g.world == 1:
        return
    from .store import atomic_write

    parts = [np.load(p, mmap_mode="r") for p in g.parts(path)]
    shape, dtype = (rows, *parts[0].shape[1:]), parts[0].dtype
    for r, part in enumerate(parts):
        n = len(_blocks(r, g.world, rows, block))
        if len(part) != n or part.dtype != dtype:
            raise UnitlensError(f"{g.part(path, r)} holds {len(part)} rows of {part.dtype}; {n} of {dtype} were "
                                "expected. Run the same command with --force to mine again.")

    def write(f):
        np.lib.format.write_array_header_1_0(f, {"descr": np.lib.format.dtype_to_descr(dtype),
                                                 "fortran_order": False, "shape": shape})
        for b in range(-(-rows // block)):  # corpus batch b is local batch b // world of rank b % world
            local = b // g.world * block
            f.write(np.ascontiguousarray(parts[b % g.world][local:local + block]).tobytes())

    atomic_write(Path(path), write)


def _blocks(rank: int, world: int, n: int, block: int):
    if world == 1:
        return range(n)
    return [i for b in range(rank, -(-n // block), world) for i in range(b * block, min(n, (b + 1) * block))]
