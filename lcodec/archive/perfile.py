"""One archive per file (`pack --per-file -o DIR`): a corpus job.

Every regular file becomes `DIR/<member path>.lcodec`, exactly what `lcodec pack FILE`
makes (with a pixel model, an image becomes an image frame as there). Frames of many
files flow through the same runner window (archive/write.py), so small files keep every
worker busy. Each archive is renamed into place when complete and recorded in a journal;
`DIR/manifest.json` lists every member at the end. `resume` keeps members that the
journal or manifest records and that are still unchanged on both sides.
"""
from __future__ import annotations

import hashlib
import json
import os
import time

from ..errors import UsageError
from ..fsio import ARCHIVE_EXT, OutFile, _remove_quietly, atomic_write, collect_inputs
from ..models import identity_text, resolve
from . import runners
from .plan import DEFAULT_FRAME_SIZE, PackStats, _check_frame_size, _Source, make_plan
from .write import _run_plans

def pack_each(paths: list[str], out_dir: str, model=None, frame_size: int = DEFAULT_FRAME_SIZE, progress=None,
              on_skip=None, jobs: int = 1, cluster=None, force: bool = False, resume: bool = False,
              pixels: bool = True) -> dict:
    """A corpus job: every regular file under `paths` becomes its own single-file archive
    `out_dir/<member path>.lcodec`, and `out_dir/manifest.json` lists them (path,
    archive, sizes, SHA-256 of content and archive, status). Frames of many files are
    coded together (`jobs` processes or `cluster`), so small files keep every worker busy.
    Each archive is written under a temporary name and renamed into place when complete,
    then recorded in the journal `out_dir/.lcodec-journal.jsonl`. With `resume`, a
    member is kept without recoding when the journal (or the manifest of a finished run)
    records it and both its archive and its original still have the recorded SHA-256;
    everything else is coded again. Returns the manifest (a dict)."""
    _check_frame_size(frame_size)
    t0 = time.perf_counter()
    m = resolve(model)
    if os.path.lexists(out_dir) and not (force or resume):
        raise UsageError(f"{out_dir} exists; pass --resume to continue a job there, or --force to overwrite it")
    if os.path.lexists(out_dir) and not os.path.isdir(out_dir):
        raise UsageError(f"{out_dir} exists and is not a folder")
    items, skipped = collect_inputs(list(paths))
    for sk in skipped:
        if on_skip:
            on_skip(sk)
    files = [(rel, full, st) for rel, full, st in items if not os.path.isdir(full)]
    out_abs = os.path.abspath(out_dir)
    for _, full, _ in files:
        if os.path.abspath(full).startswith(out_abs + os.sep):
            raise UsageError(f"{out_dir} lies inside the inputs; write the archives somewhere else")
    try:
        os.makedirs(out_dir, exist_ok=True)
    except OSError as e:
        raise UsageError(f"cannot create {out_dir}: {e.strerror or e}") from None
    journal_path = os.path.join(out_dir, EACH_JOURNAL)
    manifest_path = os.path.join(out_dir, EACH_MANIFEST)
    done = _read_each_records(journal_path, manifest_path, m.identity, frame_size) if resume else {}
    ident_text = identity_text(m.identity)
    entries = {}
    stats = PackStats(raw_bytes=sum(st.st_size for _, _, st in files))
    jf = open(journal_path, "a" if resume else "w", encoding="utf-8")
    header_line = {"journal": EACH_KIND, "model": m.identity, "frame_size": frame_size}
    jf.write(json.dumps(header_line, sort_keys=True) + "\n")

    def plans():
        for rel, full, st in files:
            arch_rel = rel + ARCHIVE_EXT
            target = os.path.join(out_dir, *arch_rel.split("/"))
            rec = done.get(rel)
            if rec is not None and _each_still_good(rec, full, st, target):
                entries[rel] = {**rec, "status": "kept"}
                if progress:
                    progress(st.st_size)
                continue
            plan = make_plan([_Source(st.st_size, path=full)], None, frame_size, m, pixels)
            plan.rel, plan.target = rel, target
            yield plan

    def on_open(plan):
        os.makedirs(os.path.dirname(plan.target), exist_ok=True)
        if os.path.isdir(plan.target):
            raise UsageError(f"{plan.target} is a folder; it cannot become an archive")
        name = "." + os.path.basename(plan.target) + ".lcodec-partial"
        plan.out = OutFile(plan.target, force=True, tmp_name=name)
        plan.out.f.write(plan.header())

    def on_record(plan, rec):
        plan.out.f.write(rec)

    def on_close(plan):
        f = plan.out.f
        f.seek(0)
        f.write(plan.header())
        plan.out.commit()
        arch_sha, arch_len = _file_sha256(plan.target)
        rec = {"path": plan.rel, "archive": plan.rel + ARCHIVE_EXT, "bytes": plan.content_size,
               "sha256": plan.content_sha.hex(), "archive_bytes": arch_len, "archive_sha256": arch_sha}
        image = plan.sources[0].image
        if image is not None:  # the original's size and SHA-256 (a pixel record's differ), for --resume
            rec["sha256"], rec["bytes"] = _file_sha256(plan.sources[0].path)
            rec["guarantee"] = image[1]
        jf.write(json.dumps(rec, sort_keys=True) + "\n")
        jf.flush()
        os.fsync(jf.fileno())
        entries[plan.rel] = {**rec, "status": "packed"}

    opened = []

    def on_open_tracked(plan):
        opened.append(plan)
        on_open(plan)

    try:
        with runners.runner(m, jobs, cluster) as r:
            _run_plans(plans(), r, stats, on_open_tracked, on_record, on_close, progress)
    except BaseException:
        for plan in opened:
            if plan.out is not None:
                plan.out.abort()
        jf.close()
        raise
    jf.close()
    members = [entries[rel] for rel, _, _ in files]
    manifest = {"manifest": EACH_MANIFEST_KIND, "model": m.identity, "model_text": ident_text,
                "frame_size": frame_size, "members": members, "skipped": list(skipped),
                "content_bytes": sum(e["bytes"] for e in members),
                "archive_bytes": sum(e["archive_bytes"] for e in members),
                "packed": sum(e["status"] == "packed" for e in members),
                "kept": sum(e["status"] == "kept" for e in members),
                "seconds": round(time.perf_counter() - t0, 3)}
    atomic_write(manifest_path, (json.dumps(manifest, indent=1, sort_keys=True) + "\n").encode(), force=True)
    _remove_quietly(journal_path)
    return manifest


EACH_JOURNAL = ".lcodec-journal.jsonl"


EACH_MANIFEST = "manifest.json"


EACH_KIND = "lcodec per-file journal 1"


EACH_MANIFEST_KIND = "lcodec per-file manifest 1"


def _file_sha256(path: str) -> tuple[str, int]:
    h, n = hashlib.sha256(), 0
    with open(path, "rb") as f:
        while True:
            b = f.read(1 << 20)
            if not b:
                return h.hexdigest(), n
            h.update(b)
            n += len(b)


def _read_each_records(journal_path: str, manifest_path: str, identity: dict, frame_size: int) -> dict:
    """Finished members of an earlier run with the same model and frame size: path -> record.
    Lines that do not parse (a run killed while writing one) are ignored."""
    done = {}
    try:
        with open(manifest_path, encoding="utf-8") as f:
            man = json.load(f)
        if man.get("manifest") == EACH_MANIFEST_KIND and man.get("model") == identity \
                and man.get("frame_size") == frame_size:
            for e in man.get("members", []):
                done[e["path"]] = {k: v for k, v in e.items() if k != "status"}
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        pass
    try:
        with open(journal_path, encoding="utf-8") as f:
            same = False
            for line in f:
                try:
                    rec = json.loads(line)
                except ValueError:
                    continue
                if not isinstance(rec, dict):
                    continue
                if rec.get("journal") == EACH_KIND:
                    same = rec.get("model") == identity and rec.get("frame_size") == frame_size
                elif same and isinstance(rec.get("path"), str):
                    done[rec["path"]] = rec
    except OSError:
        pass
    return done


def _each_still_good(rec: dict, full: str, st, target: str) -> bool:
    """The recorded archive is there, unchanged, and the original still has its SHA-256."""
    try:
        if rec.get("bytes") != st.st_size or not os.path.isfile(target):
            return False
        if os.path.getsize(target) != rec.get("archive_bytes"):
            return False
        if _file_sha256(target)[0] != rec.get("archive_sha256"):
            return False
        return _file_sha256(full)[0] == rec.get("sha256")
    except OSError:
        return False
