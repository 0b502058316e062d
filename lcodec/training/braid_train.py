"""`lcodec train --preset braid...`: count a corpus into a braid model, fit its corpus
discounts on held-out files, write the model file. Needs numpy and numba only.

Steps: a tenth of the files (by a seeded shuffle) is held out for validation; the rest
is counted (lcodec/braid_build.py); if the tables would pass the preset's size budget,
the rarest contexts are dropped (a higher `min_seen`) until they fit. Then the corpus
discounts are fitted on a sample of the held-out files by coordinate search over a few
integer settings, scored by the exact coded cost (the tables the coder would use), each
file costed on its own as `pack` would, until the time limit. The command ends with the
final model's validation bits per byte next to strata's (the built-in adaptive model
alone) on the same files.
"""
from __future__ import annotations

import os
import random
import time

import numpy as np

from ..archive.plan import DEFAULT_FRAME_SIZE
from ..coding import lane_layout
from ..format import modelfile
from ..frames import frame_lanes
from ..models import recall as R
from ..models import strata as S
from ..models.braid import Braid
from ..version import __version__
from .braid_build import build, memory_text
from .listing import corpus_record

MEMORY_DEFAULT = 32 << 20  # bytes of training text kept as the corpus memory (`train --memory`)
RECALL = dict(recall_min=8, recall_long=16)  # the memory's two context lengths (lcodec/models/recall.py)
PRESETS = {
    # corpus orders, fewest sightings of a kept context (orders >= 2), size budget of the
    # tables, and the per-file adaptive half (strata's parameters); figures in README.md
    # (mix_shift: the layers' escape weights, adapted within each frame at this rate and
    # started from the held-out sample's; lane_tables: each lane's contexts its own;
    # sse_bits: secondary estimation of the favourite byte, 2**sse_bits context buckets;
    # fork: the refinement on the byte's binary tree, its tables' and mixer's rates and
    # the mass below which a subtree is left as it is; chain_cut: the chain stops once less
    # than 2**-chain_cut of the mass is left below, about 1.3-1.5x faster both ways for
    # 0.05-0.11% more bits on the bench kinds, docs/notes/2026-12-04-speed-rows.md)
    "braid": dict(corpus_order=6, min_seen=2, budget=64 << 20, mix_shift=16, lane_tables=1, sse_bits=10, chain_cut=10,
                  file=dict(max_order=8, hash_log2=18, discount=[[13, 18, 24]] * 9, match_min=5),
                  memory=MEMORY_DEFAULT, recall=RECALL),
    "braid-lean": dict(corpus_order=4, min_seen=2, budget=16 << 20, file=dict(S.PRESETS["o6m"]), memory=0, recall=RECALL),
}
# braid plus the tree refinement (with its context-picked mixer weights, two more inputs and
# the final stage): about 4.5% smaller, slower to decode (README.md)
TREE_V1 = dict(fork_shift=3, fork_mix_shift=15, fork_cut=7)  # the refinement as first released
PRESETS["braid-tree"] = dict(PRESETS["braid"], fork=dict(TREE_V1, fork_sets=1, fork_inputs=1, fork_final=6))
VALIDATION_SAMPLE = 400_000  # bytes of held-out files the discount search costs per trial
# discount settings tried per order group (sixteenths of a count, for counts 1, 2, >=3)
CANDIDATES = [[10, 14, 20], [13, 18, 24], [14, 22, 30], [15, 26, 36], [15, 29, 42], [15, 31, 46]]


def contents_text(memory_bytes: int) -> str:
    """What a braid model file holds, in plain words (train's output and `info MODEL`)."""
    tables = "context counts of the training files (rare strings may still be inferred from them)"
    paths = ("; of the corpus only its file count, bytes and a digest of its listing (no paths; names only "
             "with --record-names)")
    if memory_bytes:
        return (f"{memory_bytes:,} bytes of the training text itself (the corpus memory: anyone with the file "
                f"can read it; train with --memory 0 to keep none) and {tables}{paths}")
    return f"no training text, only {tables}{paths}"


def nll_bits(model, data: bytes) -> float:
    """The coded cost of one file under `model`, as pack would lane it (bits)."""
    x = np.frombuffer(data, np.uint8)
    if len(x) == 0:
        return 0.0
    bits = 0.0
    for a in range(0, len(x), DEFAULT_FRAME_SIZE):
        piece = x[a:a + DEFAULT_FRAME_SIZE]
        starts, lengths = lane_layout(len(piece), frame_lanes(model, len(piece)))
        for syms, tab in model.teacher_chunks(piece, starts, lengths):
            bits -= float(np.log2(tab[np.arange(len(syms)), syms] / tab.sum(1)).sum())
    return bits


def _bpb(model, files: list[bytes]) -> float:
    n = sum(len(f) for f in files)
    return sum(nll_bits(model, f) for f in files) / max(n, 1)


PRIOR_STRENGTH = 32  # trials a learned hit-rate cell starts with (the default's too)
PRIOR_MIN_TRIALS = 64  # cells seen fewer times keep the default (no change)
RECALL_MIN_TRIALS = 16  # the same for the corpus memory's cells, which start with the trials
RECALL_PRIOR_CAP = 64  # seen (at most this many: rates near 1 need the resolution)


def _run_files(model, files: list[bytes], **collect) -> None:
    """Run the encoder's pass over each file on its own, as pack lays it out, for what
    `collect` (match_stats=..., mix_weights=...) gathers along the way."""
    for f in files:
        x = np.frombuffer(f, np.uint8)
        if len(x) == 0:
            continue
        starts, lengths = lane_layout(len(x), frame_lanes(model, len(x)))
        for _ in model.teacher_chunks(x, starts, lengths, **collect):
            pass


def match_prior(model, files: list[bytes]):
    """Hit-rate cells for the repeat model from `files` (each costed on its own), or None."""
    stats = np.zeros((S.MATCH_LENGTHS * S.MATCH_LEVELS, 2), np.int64)
    _run_files(model, files, match_stats=stats)
    if stats[:, 1].max(initial=0) < PRIOR_MIN_TRIALS:
        return None
    cells = np.arange(len(stats))
    out = np.empty((len(stats), 2), np.int32)
    out[:, 0] = 2 * (cells % S.MATCH_LEVELS) + 1  # the default: each level's midpoint
    out[:, 1] = 2 * S.MATCH_LEVELS
    seen = stats[:, 1] >= PRIOR_MIN_TRIALS
    rate = (stats[seen, 0] * PRIOR_STRENGTH + stats[seen, 1] // 2) // np.maximum(stats[seen, 1], 1)
    out[seen, 0] = np.clip(rate, 1, PRIOR_STRENGTH - 1)
    out[seen, 1] = PRIOR_STRENGTH
    return out


def recall_prior(model, files: list[bytes]):
    """Hit-rate cells for the corpus memory from `files` (each costed on its own), or None."""
    stats = np.zeros((R.CELLS, 2), np.int64)
    _run_files(model, files, recall_stats=stats)
    if stats[:, 1].max(initial=0) < PRIOR_MIN_TRIALS:
        return None
    out = np.zeros((R.CELLS, 2), np.int32)  # the default: no trials (no change)
    seen = stats[:, 1] >= RECALL_MIN_TRIALS
    trials = np.minimum(stats[seen, 1], RECALL_PRIOR_CAP)  # as many trials as were seen, at most the cap
    out[seen, 0] = (stats[seen, 0] * trials + stats[seen, 1] // 2) // stats[seen, 1]
    out[seen, 1] = trials
    return out


def mix_weights(model, files: list[bytes]) -> np.ndarray:
    """Escape weights for the model file: the online weights carried through `files`, each
    costed on its own as pack would, from zero; what they end as is where every frame of a
    new file starts."""
    from ..models.braid import MIX_CLASSES, WFRAC, WMAX

    w = np.zeros(MIX_CLASSES, np.int64)
    _run_files(model, files, mix_weights=w)
    return np.clip(w, -(WMAX << WFRAC), WMAX << WFRAC).astype(np.int32)


def train_braid(files: list[tuple[str, bytes]], corpus: list[str], out: str, time_limit: float, preset: str,
                seed: int, echo=print, memory: int | None = None, record_names: bool = False) -> dict:
    """memory: bytes of training text the model may keep (None: the preset's default).
    record_names: the model file lists the files' relative names (never paths)."""
    cfg = PRESETS[preset]
    memory = cfg["memory"] if memory is None else int(memory)
    t_start = time.perf_counter()
    order = list(range(len(files)))
    random.Random(seed).shuffle(order)
    n_val = max(1, len(files) // 10) if len(files) > 1 else 0
    val_ids = set(order[:n_val])
    train_files = [files[i][1] for i in order[n_val:]] if n_val else [files[0][1]]
    val_files = [files[i][1] for i in sorted(val_ids)] or [files[0][1][-max(1, len(files[0][1]) // 10):]]
    n_train = sum(len(f) for f in train_files)
    echo(f"counting {n_train:,} bytes ({len(train_files)} files) into braid/{preset}: corpus orders 0-{cfg['corpus_order']}; "
         f"validating on {sum(len(f) for f in val_files):,} bytes of {len(val_files)} held-out files")
    min_seen = cfg["min_seen"]
    while True:
        arrays = build(train_files, cfg["corpus_order"], min_seen, echo=echo)
        size = sum(a.nbytes for a in arrays.values())
        if size <= cfg["budget"] or min_seen >= 64:
            break
        echo(f"  {size:,} bytes of tables is over the preset's {cfg['budget']:,}: dropping contexts seen fewer "
             f"than {min_seen * 2} times")
        min_seen *= 2
    params = {"corpus_order": cfg["corpus_order"], **cfg["file"]}
    params["discount"] = [list(r) for r in params["discount"]]
    if cfg.get("lane_tables"):
        params["lane_tables"] = 1
    if cfg.get("mix_shift"):
        params["mix_shift"] = cfg["mix_shift"]
    if cfg.get("sse_bits"):
        params["sse_bits"] = cfg["sse_bits"]
    if cfg.get("chain_cut"):
        params["chain_cut"] = cfg["chain_cut"]
    model = Braid(params, arrays)
    # validation sample for the search: whole held-out files, in a seeded order, up to the cap
    rng = random.Random(seed + 1)
    sample, got = [], 0
    for f in rng.sample(val_files, len(val_files)):
        if got >= VALIDATION_SAMPLE:
            break
        sample.append(f[:DEFAULT_FRAME_SIZE])
        got += len(sample[-1])
    C, F = cfg["corpus_order"], len(params["discount"]) - 1
    # the search's coordinates: groups of orders, each of the corpus layers or the file's
    # (the high orders first: they decide most of the cost, so a short time limit gets them)
    groups = [("corpus", range(4, C + 1)), ("file", range(4, F + 1)), ("corpus", range(2, min(4, C + 1))),
              ("file", range(0, min(4, F + 1))), ("corpus", range(0, min(2, C + 1)))]
    groups = [(part, g) for part, g in groups if len(g)]
    disc = {"corpus": [list(r) for r in arrays["corpus_discount"].tolist()], "file": [list(r) for r in params["discount"]]}

    def score(d):
        model.set_corpus_discount(d["corpus"])
        model.set_file_discount(d["file"])
        return _bpb(model, sample)

    best = score(disc)
    curve = [{"seconds": round(time.perf_counter() - t_start, 1), "step": 0, "val_bpb": best}]
    echo(f"  {curve[-1]['seconds']:6.0f} s  discounts {disc['corpus'][-1]} everywhere: validation sample {best:.4f} bits per byte")
    step = 0
    for _ in range(2):  # two sweeps over the coordinates
        for part, g in groups:
            for cand in CANDIDATES:
                if time.perf_counter() - t_start >= time_limit:
                    break
                trial = {**disc, part: [list(cand) if k in g else disc[part][k] for k in range(len(disc[part]))]}
                if trial == disc:
                    continue
                v = score(trial)
                step += 1
                if v < best - 1e-5:
                    best, disc = v, trial
                curve.append({"seconds": round(time.perf_counter() - t_start, 1), "step": step, "val_bpb": best})
                echo(f"  {curve[-1]['seconds']:6.0f} s  {part} orders {g[0]}-{g[-1]} discounts {cand}: {v:.4f}  (best {best:.4f})")
    params["discount"] = disc["file"]
    disc = disc["corpus"]
    arrays["corpus_discount"] = np.array(disc, np.int64)
    model = Braid(params, arrays)
    # the repeat model's hit-rate cells, started from what they saw on held-out files
    prior = match_prior(model, sample)
    if prior is not None:
        with_prior = Braid(params, {**arrays, "match_prior": prior})
        v = _bpb(with_prior, sample)
        echo(f"  {time.perf_counter() - t_start:6.0f} s  repeat model started from held-out hit rates: {v:.4f} "
             f"(without: {best:.4f}){'' if v < best else ', not kept'}")
        if v < best:
            arrays["match_prior"], model, best = prior, with_prior, v
    if cfg.get("mix_shift"):
        # the layers' escape weights (on during the search, from zero): started from the
        # weights the held-out sample leaves, if that lowers the sample's cost; and off
        # altogether if the plain chain does better
        init = mix_weights(model, sample)
        with_init = Braid(params, {**arrays, "mix_init": init})
        v = _bpb(with_init, sample)
        echo(f"  {time.perf_counter() - t_start:6.0f} s  escape weights started from the held-out sample's: {v:.4f} "
             f"(from zero: {best:.4f}){'' if v < best else ', not kept'}")
        if v < best:
            arrays["mix_init"], model, best = init, with_init, v
        plain_params = {k: x for k, x in params.items() if k != "mix_shift"}
        plain = Braid(plain_params, {k: x for k, x in arrays.items() if k != "mix_init"})
        vp = _bpb(plain, sample)
        echo(f"  {time.perf_counter() - t_start:6.0f} s  without escape weights: {vp:.4f}{', kept off' if vp < best else ''}")
        if vp < best:
            params, model, best = plain_params, plain, vp
            arrays.pop("mix_init", None)
    mem_info = {"budget_bytes": memory, "stored_bytes": 0}
    if memory > 0:
        # the corpus memory: the training text itself (deduplicated, up to the budget) and
        # the predictor that follows earlier occurrences of the current context in it, its
        # hit-rate cells started from the held-out sample's; kept if it lowers the sample's cost
        text, summary = memory_text(train_files, memory)
        mem_info.update(summary, budget_bytes=memory, stored_bytes=0)
        if len(text):
            mparams = {**params, **cfg["recall"], "memory_bytes": int(len(text))}
            marrays = {**arrays, "memory": text}
            with_mem = Braid(mparams, marrays)
            prior = recall_prior(with_mem, sample)
            if prior is not None:
                marrays["recall_prior"] = prior
                with_mem = Braid(mparams, marrays)
            vm = _bpb(with_mem, sample)
            mem_info["sample_bpb"], mem_info["sample_bpb_without"] = round(vm, 4), round(best, 4)
            echo(f"  {time.perf_counter() - t_start:6.0f} s  corpus memory, {len(text):,} bytes of training text "
                 f"({summary['unique_bytes']:,} unique of {summary['bytes']:,}): {vm:.4f} (without: {best:.4f})"
                 f"{'' if vm < best else ', not kept'}")
            if vm < best:
                params, arrays, model, best = mparams, marrays, with_mem, vm
                mem_info["stored_bytes"] = int(len(text))
    if cfg.get("fork"):
        # the refinement on the byte's binary tree (adapts within each frame, nothing fitted):
        # kept if it lowers the held-out sample's cost
        fork_params = {**params, **cfg["fork"]}
        forked = Braid(fork_params, arrays)
        vf = _bpb(forked, sample)
        echo(f"  {time.perf_counter() - t_start:6.0f} s  with the tree refinement: {vf:.4f} "
             f"(without: {best:.4f}){'' if vf < best else ', not kept'}")
        if vf < best:
            params, model, best = fork_params, forked, vf
    val_bpb = _bpb(model, val_files)
    strata_bpb = _bpb(S.Strata(), val_files)
    if mem_info["stored_bytes"]:
        # the held-out files join the memory once they are no longer needed to judge it (the
        # validation figure above was measured without them): every file the user gave is
        # text a new file may repeat
        text, summary = memory_text(train_files + val_files, memory)
        if len(text) > mem_info["stored_bytes"]:
            params = {**params, "memory_bytes": int(len(text))}
            arrays = {**arrays, "memory": text}
            mem_info.update(summary, stored_bytes=int(len(text)), held_out_files_added=len(val_files))
    meta = {
        "lcodec_version": __version__,
        "preset": preset,
        "seed": seed,
        "quantisation": "counts scaled per row to at most 255 (one byte), integer discounts in sixteenths of a count",
        "training": {"files": len(train_files), "bytes": n_train, "seconds": round(time.perf_counter() - t_start, 1),
                     "min_seen": min_seen, "corpus": corpus_record(corpus, files, record_names)},
        "validation": {"files": len(val_files), "bytes": int(sum(len(f) for f in val_files)),
                       "integer_bpb": round(val_bpb, 4), "strata_bpb": round(strata_bpb, 4)},
        "corpus_memory": mem_info,
        "contents": contents_text(mem_info["stored_bytes"]),
        "learning_curve": curve,
    }
    from .curves import write_curve_png

    png = write_curve_png(curve, out + ".curve.png", f"braid/{preset}: validation bits per byte while fitting discounts")
    if png:
        meta["learning_curve_png"] = os.path.basename(png)
    sha = modelfile.dump(out, {"name": "braid", "params": params}, arrays, **meta)
    echo(f"exported braid model: validation {val_bpb:.4f} bits per byte (strata alone {strata_bpb:.4f}); "
         f"{os.path.getsize(out):,} bytes, sha256 {sha[:16]}... -> {out}")
    echo(f"this model file holds {meta['contents']}")
    return {"sha256": sha, "integer_bpb": val_bpb, "strata_bpb": strata_bpb, "curve": curve, "meta": meta}
