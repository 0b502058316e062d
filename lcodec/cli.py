"""Command line: `lcodec pack | unpack | verify | info | bench | demo`.

Exit codes: 0 ok; 1 a data problem (damaged archive, mismatch, wrong or missing model);
2 a usage error (bad option, missing input, refused overwrite); 130 interrupted (SIGINT),
143 terminated (SIGTERM): then nothing is left under a final name and no temporary file
is left behind (a `pack --resume` job keeps its partial archive and journal). No
traceback for bad input: set LCODEC_DEBUG=1 to see one for an internal error.
"""
from __future__ import annotations

import functools
import json
import os
import signal
import sys

# BLAS on one thread unless the user says otherwise, set before numpy loads (the first
# lcodec module that imports it follows): the pixel model's products are small, and two
# BLAS threads only fight lcodec's own workers for the cores (packing the image bench's
# 8-bit test set took 9.5 s with two and 6.2-6.6 s with one, load about 3; docs/notes/model-tessel.md,
# "Decoding threads"). Training uses torch's own thread pool, which this leaves alone.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import click  # noqa: E402

from .version import __version__  # noqa: E402
from . import errors  # noqa: E402
from .errors import LcodecError, Terminated, UsageError  # noqa: E402
from .fsio import ARCHIVE_EXT, atomic_write, map_input, map_stream, read_input, remove_live_temporaries  # noqa: E402

EXAMPLES = {
    "pack": "lcodec pack station-logs/ -o station-logs" + ARCHIVE_EXT + " --jobs auto\n"
            "  lcodec pack station-logs/ -o station-archives/ --per-file --resume\n"
            "  lcodec pack station-logs/ -o station-logs" + ARCHIVE_EXT + " --cluster tcp://127.0.0.1:8786",
    "unpack": "lcodec unpack station-logs" + ARCHIVE_EXT + " -o restored/\n"
              "  lcodec unpack damaged" + ARCHIVE_EXT + " -o restored/ --salvage --keep-damaged",
    "verify": "lcodec verify station-logs" + ARCHIVE_EXT + " --against station-logs/ --jobs 2",
    "info": "lcodec info station-logs" + ARCHIVE_EXT + " --json",
    "bench": "lcodec bench my-corpus/ --json bench.json --csv bench.csv\n"
             "  lcodec bench --kind image scanner-7/test/ -m scans.lcmodel",
    "demo": "lcodec demo",
    "train": "lcodec train station-logs/ -o logs.lcmodel --time-limit 600\n"
             "  lcodec train --kind image scanner-7/train/ -o scans.lcmodel --time-limit 120",
    "explain": "lcodec explain station-logs/vh07_gateway.log -o vh07-costs.html",
    "probe": "lcodec probe digits.lcmodel --records digits-test.bin",
}


def _example(name):
    return f"\b\nExample:\n  {EXAMPLES[name]}"


def _silence_stdout():
    """After stdout failed, point it at /dev/null so the exit flush cannot fail again."""
    try:
        fd = os.open(os.devnull, os.O_WRONLY)
        os.dup2(fd, sys.stdout.fileno())
        os.close(fd)
    except (OSError, ValueError):
        pass


def _on_signal(signum, frame):
    # once: a second signal during the cleanup must not cut it short
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    errors.PENDING_SIGNALS.append(int(signum))  # for code that may lose the exception below
    if errors.HOLDING[0]:
        return  # inside fsio.signals_held: raised when the block ends
    raise Terminated() if signum == signal.SIGTERM else KeyboardInterrupt()


def _catch_signals() -> None:
    """SIGINT and SIGTERM become exceptions in the main thread (not in worker processes,
    which start with their own handlers). Where Python runs the handler in a place that
    cannot raise (a ctypes callback such as llvmlite's while numba compiles, a finaliser),
    its exception is lost and Python would print it as "Exception ignored": the signal is
    recorded all the same (errors.PENDING_SIGNALS), raised at the next progress report and
    before any output gets its final name (errors.raise_pending), so that print is dropped."""
    import threading

    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGINT, _on_signal)
        signal.signal(signal.SIGTERM, _on_signal)
        if sys.unraisablehook is not _quiet_lost_signal:
            global _NEXT_UNRAISABLEHOOK
            _NEXT_UNRAISABLEHOOK = sys.unraisablehook
            sys.unraisablehook = _quiet_lost_signal


_NEXT_UNRAISABLEHOOK = sys.unraisablehook


def _quiet_lost_signal(unraisable) -> None:
    """sys.unraisablehook: the signal handler's own exception, lost where it was raised, is
    not printed (it is recorded and raised later); anything else goes to the usual hook."""
    if isinstance(unraisable.exc_value, (KeyboardInterrupt, Terminated)) and errors.PENDING_SIGNALS:
        return
    _NEXT_UNRAISABLEHOOK(unraisable)


def _interrupted(name: str, code: int):
    remove_live_temporaries()  # one the interruption reached before its `with` or `try` began
    click.echo(f"lcodec: {name}; stopped, nothing was written under the final name and no temporary "
               f"file was left (a --resume job keeps its journal)", err=True)
    sys.exit(code)


def guarded(fn):
    """Turn lcodec errors into a one-line message and their exit code."""
    @functools.wraps(fn)
    def wrapper(*a, **k):
        try:
            _catch_signals()
            return fn(*a, **k)
        except LcodecError as e:
            click.echo(f"lcodec: {e}", err=True)
            sys.exit(e.exit_code)
        except KeyboardInterrupt:
            _interrupted("interrupted (SIGINT)", 130)
        except Terminated:
            _interrupted("terminated (SIGTERM)", 143)
        except BrokenPipeError:
            sys.exit(1)
        except OSError as e:  # e.g. stdout on a full disk; file outputs report their own
            _silence_stdout()
            where = f" ({e.filename})" if e.filename else ""
            click.echo(f"lcodec: input/output failed: {e.strerror or e}{where}", err=True)
            sys.exit(2)
        except MemoryError:
            click.echo("lcodec: out of memory", err=True)
            sys.exit(1)
        except Exception as e:  # an internal error, not the user's input
            if os.environ.get("LCODEC_DEBUG"):
                raise
            click.echo(f"lcodec: internal error: {type(e).__name__}: {e} (LCODEC_DEBUG=1 shows details)", err=True)
            sys.exit(3)
    return wrapper


class Progress:
    """A progress bar on stderr for long work when stderr is a terminal; silent otherwise."""

    def __init__(self, total: int, label: str, quiet: bool = False):
        show = not quiet and sys.stderr.isatty() and total >= (1 << 20)
        self.bar = click.progressbar(length=total, label=label, file=sys.stderr) if show else None
        if self.bar:
            self.bar.__enter__()

    def __call__(self, n: int):
        errors.raise_pending()  # a signal whose exception was lost: stop here
        if self.bar:
            self.bar.update(n)

    def close(self):
        if self.bar:
            self.bar.__exit__(None, None, None)
            self.bar = None


model_option = click.option("-m", "--model", "model", type=click.Path(dir_okay=False), default=None,
                            help="Model file to use (default: the built-in adaptive model).")
force_option = click.option("--force", is_flag=True, help="Overwrite an existing output.")
threads_option = click.option("--threads", type=click.IntRange(1, 64), default=1, show_default=True,
                              help="Frames decoded side by side by threads of this process (images: one "
                                   "frame each; any model). A lone large image's bands go to N forked "
                                   "workers (threads where forking is not safe). Same output. --jobs uses "
                                   "worker processes instead; give one or the other.")
quiet_option = click.option("-q", "--quiet", is_flag=True, help="No progress or summary on stderr.")


def parse_size(text: str, option: str) -> int:
    """A byte count written as a whole number with an optional K, M, G or T (powers of 1024)."""
    t = str(text).strip().upper().removesuffix("B").removesuffix("I")
    mult = {"K": 1 << 10, "M": 1 << 20, "G": 1 << 30, "T": 1 << 40}.get(t[-1:], 1)
    digits = t[:-1] if mult > 1 else t
    if not digits.isdigit():
        raise UsageError(f"{option} takes a size such as 32M, 512K or 0, not {text!r}")
    return int(digits) * mult


def _ceiling_value(ctx, param, value):
    if value is None or str(value).strip().lower() == "none":
        return None
    try:
        return parse_size(value, "--output-ceiling")
    except UsageError as e:
        raise click.BadParameter(str(e)) from None


ceiling_option = click.option("--output-ceiling", "ceiling", default="64G", show_default=True,
                              callback=_ceiling_value, metavar="SIZE",
                              help="Refuse, before decoding anything, an archive whose header claims more "
                                   "content than SIZE (K, M, G, T; 'none': no ceiling). Exit 1.")


def _jobs_value(ctx, param, value):
    if value is None:
        return None
    from .archive.runners import parse_jobs

    try:
        return parse_jobs(value)
    except UsageError as e:
        raise click.BadParameter(str(e).replace("--jobs takes", "takes")) from None


jobs_option = click.option("-j", "--jobs", "jobs", default=None, callback=_jobs_value, metavar="N",
                           help="Code frames in N worker processes (0 or 'auto': every core). The archive "
                                "is the same bytes for any N. Default 1. Byte and pixel models alike. "
                                "Unpacking one large image, N workers decode its bands.")
cluster_option = click.option("--cluster", "cluster", default=None, metavar="ADDRESS",
                              help="Run the coding on an existing dask.distributed cluster, given its "
                                   "scheduler's address (tcp://HOST:PORT). Same bytes as a local run.")


def _where(jobs, cluster):
    if cluster is not None and jobs not in (None, 1):
        raise UsageError("give --jobs or --cluster, not both (a cluster's workers decide its parallelism)")
    return (jobs or 1), cluster


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="lcodec")
def main():
    """lcodec: lossless compression with learned and adaptive density models.

    \b
    Examples:
      lcodec pack notes.txt -o notes.txt.lcodec
      lcodec unpack notes.txt.lcodec -o notes.txt
      lcodec demo
    """


def _read_archive(path: str):
    """The archive's bytes, mapped rather than read (stdin is spooled to a temporary file)."""
    if path == "-":
        return map_stream(sys.stdin.buffer)
    return map_input(path)


@main.command(epilog=_example("pack"))
@click.argument("inputs", nargs=-1, required=True)
@click.option("-o", "--output", "output", default=None,
              help=f"Archive to write ('-' for stdout). Default: the single input's name + {ARCHIVE_EXT}. "
                   f"With --per-file: the folder the archives go to.")
@model_option
@click.option("--frame-size", type=click.IntRange(1, 1 << 26), default=1 << 20, show_default=True,
              help="Raw bytes per independently decodable frame.")
@jobs_option
@cluster_option
@click.option("--per-file", is_flag=True,
              help="Corpus job: one single-file archive per input file, under the -o folder, mirroring "
                   "the tree, with manifest.json listing every member (sizes, SHA-256, status).")
@click.option("--resume", is_flag=True,
              help="Make the job resumable, and continue an interrupted run of the same command: "
                   "finished frames (one archive) or finished members (--per-file) are not coded again.")
@click.option("--no-pixels", is_flag=True,
              help="With a pixel model (-m, trained with --kind image): code image files as bytes too "
                   "(byte-exact), not as pixels.")
@force_option
@quiet_option
@guarded
def pack(inputs, output, model, frame_size, jobs, cluster, per_file, resume, no_pixels, force, quiet):
    """Pack files, folders, or '-' (stdin) into one archive, or one archive per file.

    One file or stdin makes a single-file archive; several inputs or a folder make a
    multi-member archive (paths, sizes, modes and SHA-256 of each member are kept).
    Frames are read, coded and written as they go: memory does not grow with the input.
    """
    from . import api

    jobs, cluster = _where(jobs, cluster)
    if "-" in inputs and len(inputs) > 1:
        raise UsageError("'-' (stdin) cannot be packed together with other inputs")
    if per_file:
        if output is None or output == "-":
            raise UsageError("--per-file writes one archive per file: give -o with a folder name")
        if "-" in inputs:
            raise UsageError("--per-file packs files and folders, not stdin")
        if any(os.path.abspath(output) == os.path.abspath(i) for i in inputs):
            raise UsageError("the output folder would be an input")
        bar = Progress(_tree_bytes(inputs), "packing", quiet)
        man = api.pack_each(list(inputs), output, model, frame_size, bar, jobs=jobs, cluster=cluster, force=force,
                            resume=resume, pixels=not no_pixels,
                            on_skip=lambda p: click.echo(f"lcodec: skipped {p} (not a regular file)", err=True))
        bar.close()
        if not quiet:
            raw, coded = man["content_bytes"], man["archive_bytes"]
            click.echo(f"{len(man['members'])} archives ({man['packed']} packed, {man['kept']} kept from an "
                       f"earlier run): {raw} -> {coded} bytes, {8.0 * coded / max(raw, 1):.3f} bits per byte, "
                       f"{man['seconds']:.2f} s; manifest {os.path.join(output, api.EACH_MANIFEST)}", err=True)
        return
    if output is None:
        if inputs[0] == "-" or len(inputs) > 1:
            raise UsageError("give -o/--output when packing stdin or several inputs")
        output = os.path.normpath(inputs[0]) + ARCHIVE_EXT
    if output != "-" and os.path.lexists(output) and not force:
        raise UsageError(f"{output} exists; pass --force to overwrite it")
    if output != "-" and any(os.path.abspath(output) == os.path.abspath(i) for i in inputs if i != "-"):
        raise UsageError("the output would overwrite an input")
    if resume and (output == "-" or inputs == ("-",)):
        raise UsageError("--resume needs files as input and a file as output (not stdin or stdout)")
    target = sys.stdout.buffer if output == "-" else output
    if inputs == ("-",):
        import tempfile

        with tempfile.TemporaryDirectory() as d:  # spooled: the header needs the size first
            spool = os.path.join(d, "stdin")
            with open(spool, "wb") as f:
                import shutil

                shutil.copyfileobj(sys.stdin.buffer, f, 1 << 20)
            bar = Progress(os.path.getsize(spool), "packing", quiet)
            stats = api.pack_to([spool], target, model, frame_size, bar, jobs=jobs, cluster=cluster, force=force,
                                pixels=not no_pixels)
    else:
        bar = Progress(_tree_bytes(inputs), "packing", quiet)
        stats = api.pack_to(list(inputs), target, model, frame_size, bar, jobs=jobs, cluster=cluster, force=force,
                            resume=resume,
                            on_skip=lambda p: click.echo(f"lcodec: skipped {p} (not a regular file)", err=True),
                            pixels=not no_pixels)
    bar.close()
    if not quiet:
        kept = f" ({stats.kept_frames} more kept from the interrupted run)" if stats.kept_frames else ""
        click.echo(f"{stats.raw_bytes} -> {stats.coded_bytes} bytes, {stats.bits_per_byte:.3f} bits per byte "
                   f"(model NLL {stats.nll_bits / max(stats.raw_bytes - stats.kept_bytes, 1):.3f}), "
                   f"{stats.frames} frames{kept}, {stats.encode_s:.2f} s", err=True)
        if stats.images:
            n = sum(i["samples"] for i in stats.images)
            kinds = {}
            for i in stats.images:
                kinds[i["guarantee"]] = kinds.get(i["guarantee"], 0) + 1
            click.echo(f"{len(stats.images)} images as pixels ("
                       + ", ".join(f"{v} {k}" for k, v in sorted(kinds.items())) + "): "
                       f"{8.0 * sum(i['coded_bytes'] for i in stats.images) / n:.3f} bits per sub-pixel "
                       f"(headers and metadata included)", err=True)


def _tree_bytes(inputs) -> int:
    total = 0
    for p in inputs:
        if os.path.isdir(p):
            for dp, _, names in os.walk(p):
                for n in names:
                    try:
                        total += os.lstat(os.path.join(dp, n)).st_size
                    except OSError:
                        pass
        elif os.path.isfile(p):
            total += os.path.getsize(p)
    return total


@main.command(epilog=_example("unpack"))
@click.argument("archive")
@click.option("-o", "--output", "output", default=None,
              help=f"File or folder to write ('-' for stdout). Default: the archive name without {ARCHIVE_EXT}.")
@model_option
@force_option
@click.option("--salvage", "salvage_mode", is_flag=True,
              help="Damaged archive: write every member (or the content) whose frames all decode and whose "
                   "SHA-256 matches, leave the rest out, and write a report (OUT.salvage.json). Exit 1 if "
                   "anything was damaged.")
@click.option("--keep-damaged", is_flag=True,
              help="With --salvage: also write damaged members as NAME.lcodec-damaged, damaged ranges zero-filled.")
@click.option("--report", "report_path", type=click.Path(dir_okay=False), default=None,
              help="With --salvage: where the JSON report goes (default: OUT.salvage.json).")
@threads_option
@jobs_option
@cluster_option
@ceiling_option
@quiet_option
@guarded
def unpack(archive, output, model, force, salvage_mode, keep_damaged, report_path, threads, jobs, cluster, ceiling,
           quiet):
    """Restore an archive: a file, a folder for multi-member archives, or '-' for stdout.

    Every frame checksum and the SHA-256 of the content are checked before anything is
    written under the final name. With --salvage, a damaged archive gives back what is
    undamaged (see README.md, "Damaged archives").
    """
    from . import api

    jobs, cluster = _where(jobs, cluster)
    if (salvage_mode or keep_damaged or report_path) and (jobs > 1 or cluster or threads > 1):
        raise UsageError("--salvage runs in one process: leave out --jobs, --cluster and --threads")
    blob = _read_archive(archive)
    if output is None:
        if archive == "-" or not archive.endswith(ARCHIVE_EXT):
            raise UsageError(f"give -o/--output (the archive name does not end in {ARCHIVE_EXT})")
        output = archive[: -len(ARCHIVE_EXT)]
    if output != "-" and os.path.lexists(output) and not force:
        raise UsageError(f"{output} exists; pass --force to overwrite it")
    if salvage_mode or keep_damaged or report_path:
        from .archive import salvage as S

        if not salvage_mode:
            raise UsageError("--keep-damaged and --report go with --salvage")
        if output == "-":
            raise UsageError("--salvage writes files and a report: give -o with a file or folder name")
        hints = S.read_header_hints(memoryview(blob))
        if hints is not None and ceiling is not None and hints.content_size > ceiling:
            from .errors import CeilingError

            raise CeilingError(f"the header claims {hints.content_size:,} bytes of content, more than the "
                             f"output ceiling of {ceiling:,} bytes (raise it with --output-ceiling SIZE, or 'none')")
        bar = Progress(min(hints.content_size, 1 << 40) if hints else 0, "salvaging", quiet)
        try:
            res = S.salvage_to(blob, output, model, keep_damaged, force, report_path, archive_name=archive,
                               progress=bar, ceiling=ceiling)
        finally:
            bar.close()
        if not (quiet and res.ok):
            for line in S.summary(res):
                click.echo(line, err=True)
        sys.exit(0 if res.ok else 1)
    api.check_ceiling(blob, ceiling)
    multi = api.is_multi(blob)
    bar = Progress(api.info(blob)["content_bytes"], "unpacking", quiet)
    if multi:
        if output == "-":
            raise UsageError("this archive holds several members; unpack it into a folder, not stdout")
        api.unpack_to_dir(blob, output, model, force, bar, jobs=jobs, cluster=cluster, workers=threads,
                          ceiling=ceiling)
    else:
        api.unpack_to_file(blob, sys.stdout.buffer if output == "-" else output, model, force, bar,
                           jobs=jobs, cluster=cluster, workers=threads, ceiling=ceiling)
    bar.close()


@main.command(epilog=_example("verify"))
@click.argument("archive")
@click.option("--against", type=click.Path(exists=True), default=None,
              help="Also compare the decoded content with this original file or folder.")
@model_option
@threads_option
@jobs_option
@cluster_option
@ceiling_option
@quiet_option
@guarded
def verify(archive, against, model, threads, jobs, cluster, ceiling, quiet):
    """Decode an archive and check every checksum; exit 0 when exact, 1 when not."""
    from . import api

    jobs, cluster = _where(jobs, cluster)
    blob = _read_archive(archive)
    try:
        total = api.info(blob)["content_bytes"]
    except LcodecError:
        total = 0
    bar = Progress(total, "verifying", quiet)
    rep = api.verify(blob, model, against, bar, jobs=jobs, cluster=cluster, workers=threads, ceiling=ceiling)
    bar.close()
    if rep.ok:
        what = f"{rep.members} members, " if rep.members else ""
        extra = f", identical to {against}" if against else ""
        click.echo(f"ok: {what}{rep.content_bytes} bytes in {rep.frames} frames, all checksums match{extra}")
        if rep.guarantees:
            click.echo("  " + "; ".join(f"{n} {g}" for g, n in sorted(rep.guarantees.items()))
                       + " (byte-exact: SHA-256 of the file's bytes; pixel-exact: SHA-256 of its samples "
                         "and metadata, the file is rebuilt)")
        return
    for p in rep.problems:
        click.echo(f"FAILED: {p}", err=True)
    if not any(k in p for p in rep.problems for k in ("not an lcodec archive", "unsupported format version")):
        click.echo(f"(lcodec unpack {archive} -o OUT --salvage writes every undamaged member and a report)", err=True)
    sys.exit(1)


@main.command(epilog=_example("info"))
@click.argument("path")
@click.option("--json", "as_json", is_flag=True, help="Print JSON instead of text.")
@click.option("--frames/--no-frames", default=False, help="List every frame (text output).")
@guarded
def info(path, as_json, frames):
    """Describe an archive (header, members, frames, model identity) or a model file."""
    from . import api
    from .format import modelfile

    blob = _read_archive(path)
    if blob[:8] == modelfile.MAGIC:
        meta, arrays, sha = modelfile.parse(blob, where=path)
        d = {"model_file": path, "sha256": sha, "bytes": len(blob), **meta}
        if meta["architecture"]["name"] == "braid":  # what the file holds, in plain words (files made before said nothing)
            from .training.braid_train import contents_text

            mem = arrays.get("memory")
            d["contents"] = contents_text(0 if mem is None else len(mem))
        if as_json:
            click.echo(json.dumps(d, indent=2))
        else:
            click.echo(f"model file {path}: {meta['architecture']['name']}, {len(blob)} bytes, sha256 {sha}")
            if "contents" in d:
                click.echo(f"  holds: {d['contents']}")
            for k, v in sorted(meta.items()):
                if k == "learning_curve" and isinstance(v, list) and len(v) > 4:
                    click.echo(f"  {k}: {len(v)} points, last {json.dumps(v[-1])} (all of them: --json)")
                elif k not in ("arrays", "contents"):
                    click.echo(f"  {k}: {json.dumps(v)}")
            for a in meta["arrays"]:
                click.echo(f"  array {a['name']}: {a['dtype']} {a['shape']}")
        return
    d = api.info(blob)
    if as_json:
        click.echo(json.dumps(d, indent=2))
        return
    click.echo(f"lcodec archive, format version {d['format_version']}"
               + (f", archive identity {d['archive_id']}" if d.get("archive_id") else ""))
    click.echo(f"  content   {d['content_bytes']} bytes, sha256 {d['content_sha256']}")
    click.echo(f"  archive   {d['archive_bytes']} bytes, {d['bits_per_byte']:.3f} bits per byte")
    click.echo(f"  model     {d['model_text']}")
    methods = {}
    for f in d["frames"]:
        methods[f["method"]] = methods.get(f["method"], 0) + 1
    click.echo(f"  frames    {len(d['frames'])} of up to {d['frame_size']} bytes ("
               + ", ".join(f"{n} {m}" for m, n in sorted(methods.items())) + ")")
    if frames:
        for f in d["frames"]:
            im = f.get("image", {})
            shape = (f", image {im['rows']} x {im['columns']} x {im['channels']}, {im['bits_per_sample']}-bit"
                     + (f", {im['bands']} bands" if "bands" in im else "") if "rows" in im else "")
            click.echo(f"    #{f['index']}: {f['raw_bytes']} -> {f['coded_bytes']} bytes, {f['method']}, "
                       f"{f['lanes']} lanes, crc32c {f['crc32c']}{shape}")
    imgs = [f["image"] for f in d["frames"] if "image" in f and "rows" in f["image"]]
    if imgs:
        n = sum(i["rows"] * i["columns"] * i["channels"] for i in imgs)
        bits = sum(i["bits_per_subpixel"] * i["rows"] * i["columns"] * i["channels"] for i in imgs)
        click.echo(f"  images    {len(imgs)} coded as pixels, {n} sub-pixels, {bits / n:.3f} bits per sub-pixel")
    if d["members"] is None:
        click.echo(f"  guarantee {d['guarantee']}")
    if d["members"] is not None:
        click.echo(f"  members   {len(d['members'])}")
        for m in d["members"]:
            g = "" if m["folder"] else f"  {m['guarantee']}"
            click.echo(f"    {m['path']}{'/' if m['folder'] else ''}  {m['bytes']} bytes  mode {m['mode']}{g}")


@main.command(epilog=_example("bench"))
@click.argument("corpus_dir", type=click.Path(exists=True))
@model_option
@click.option("--json", "json_out", type=click.Path(dir_okay=False), default=None, help="Write the rows as JSON.")
@click.option("--csv", "csv_out", type=click.Path(dir_okay=False), default=None, help="Write the rows as CSV.")
@click.option("--split", "split", type=click.FloatRange(0.01, 0.99), default=None,
              help="CORPUS_DIR is a flat folder: hold out this fraction of files as the test split (fixed seed).")
@click.option("--seed", type=int, default=0, show_default=True, help="Seed of --split.")
@click.option("--report", "report_dir", type=click.Path(), default=None,
              help="Also write a report folder: index.html, summary.md, the rows, PNG charts (needs matplotlib).")
@click.option("--kind", type=click.Choice(["bytes", "image", "records"]), default="bytes", show_default=True,
              help="image: CORPUS_DIR is a folder of test images and -m a pixel model; reports bits per "
                   "sub-pixel against PNG, WebP, JPEG-LS, JPEG 2000 and JPEG XL (needs imagecodecs). "
                   "records: CORPUS_DIR is one file of fixed-size records and -m a heddle model file (the "
                   "layer kit's); bits per symbol against PNG, JPEG-LS, JPEG XL, xz, zstd and PPMd.")
@force_option
@quiet_option
@guarded
def bench(corpus_dir, model, json_out, csv_out, split, seed, report_dir, kind, force, quiet):
    """Compare lcodec with general compressors on a corpus with train/ and test/ folders.

    Every test file is compressed on its own by every codec and round-trip checked.
    Three baselines use train/: zstd-19-dict (a small dictionary trained on it),
    zstd-19-rawdict (up to 32 MiB of it as a raw dictionary) and ppmd-o16-primed (PPMd
    order 16 that reads the same bytes before each test file); each row's model bytes
    is what its decoder must already hold.
    """
    if kind == "image":
        return _bench_images(corpus_dir, model, json_out, csv_out or report_dir or split, force, quiet)
    if kind == "records":
        return _bench_records(corpus_dir, model, json_out, csv_out or report_dir or split, force)
    if not os.path.isdir(corpus_dir):
        raise UsageError(f"{corpus_dir} is not a folder (a corpus with train/ and test/)")
    from .measure import bench as B

    for out in (json_out, csv_out):
        if out and os.path.lexists(out) and not force:
            raise UsageError(f"{out} exists; pass --force to overwrite it")
    if report_dir:
        from .measure import report as R

        R.check_out_dir(report_dir, force)
        R.require_matplotlib()
    codecs = [B.lcodec_codec(None, "lcodec-strata")]
    if model:
        codecs.insert(0, B.lcodec_codec(model, "lcodec-model"))
    progress = None if quiet else (lambda msg: click.echo(msg, err=True))
    rows = B.run_bench(corpus_dir, codecs, progress=progress, **({"split": split, "seed": seed} if split else {}))
    if json_out:
        B.write_json(rows, json_out)
    if csv_out:
        B.write_csv(rows, csv_out)
    click.echo(B.format_table(rows))
    if report_dir:
        R.write_report(rows, report_dir, title=f"lcodec bench: {os.path.basename(os.path.abspath(corpus_dir))}",
                       force=force)
        if not quiet:
            click.echo(f"report written to {os.path.join(report_dir, 'index.html')}", err=True)


def _bench_images(corpus_dir, model, json_out, unsupported, force, quiet):
    from .measure import imagebench as IB
    from .models import resolve

    if unsupported:
        raise UsageError("--csv, --report and --split go with --kind bytes")
    if model is None or not getattr(resolve(model), "is_image_model", False):
        raise UsageError("--kind image needs -m with a pixel model (lcodec train --kind image)")
    if json_out and os.path.lexists(json_out) and not force:
        raise UsageError(f"{json_out} exists; pass --force to overwrite it")
    try:
        import imagecodecs  # noqa: F401
    except ImportError:
        raise UsageError("the image bench needs imagecodecs: pip install -e .[images]") from None
    rows = []
    for f in IB.image_files([corpus_dir]):
        try:
            rows.append(IB.bench_file(f, model))
        except UsageError as e:
            if not quiet:
                click.echo(f"lcodec: skipped {e}", err=True)
    if not rows:
        raise UsageError(f"{corpus_dir} holds no image lcodec codes as pixels")
    for line in IB.format_rows(rows):
        click.echo(line)
    click.echo(f"model file {os.path.getsize(model):,} bytes")
    if json_out:
        atomic_write(json_out, json.dumps({"rows": rows, "totals": IB.totals(rows),
                                           "model_bytes": os.path.getsize(model)}, indent=1).encode(), force=force)


def _bench_records(path, model, json_out, unsupported, force):
    from .measure import recordbench as RB

    if unsupported:
        raise UsageError("--csv, --report and --split go with --kind bytes")
    if model is None or os.path.isdir(path):
        raise UsageError("--kind records takes one file of records and -m with a heddle model file")
    if json_out and os.path.lexists(json_out) and not force:
        raise UsageError(f"{json_out} exists; pass --force to overwrite it")
    row = RB.bench_records(path, model)
    for line in RB.format_row(row):
        click.echo(line)
    if json_out:
        atomic_write(json_out, json.dumps(row, indent=1).encode(), force=force)


@main.command(epilog=_example("probe"))
@click.argument("model_file", type=click.Path(exists=True, dir_okay=False))
@click.option("--records", "records_file", type=click.Path(exists=True, dir_okay=False), default=None,
              help="A file of records (one byte per symbol) to check on; default: random records.")
@click.option("--count", type=click.IntRange(1, 100000), default=64, show_default=True,
              help="How many records of --records (or random ones) to use.")
@click.option("--shape", default=None, metavar="ROWSxCOLS",
              help="Record size for an image-sized model (default 8x8).")
@click.option("--json", "json_out", type=click.Path(dir_okay=False), default=None, help="Write the figures as JSON.")
@force_option
@guarded
def probe(model_file, records_file, count, shape, json_out, force):
    """Check a heddle model file (the layer kit's): is it autoregressive (each position
    perturbed in turn; a broken pair is named), do the parallel and step passes agree, are
    the tables the same with 1 and 2 threads and other batch shapes, its integer NLL and
    its decoding speed. Exit 1 when a check fails. No torch needed."""
    from .measure import recordbench as RB

    rep = RB.probe_file(model_file, records_file, count, shape, echo=click.echo)
    if json_out:
        if os.path.lexists(json_out) and not force:
            raise UsageError(f"{json_out} exists; pass --force to overwrite it")
        atomic_write(json_out, json.dumps(rep, indent=1).encode(), force=force)
    if not rep.get("ok"):
        sys.exit(1)


@main.command(epilog=_example("explain"))
@click.argument("file")
@model_option
@click.option("-o", "--output", "output", required=True, type=click.Path(dir_okay=False),
              help="The HTML page to write (a PNG heat strip is written beside it).")
@click.option("--png", "png_out", type=click.Path(dir_okay=False), default=None,
              help="Where to write the PNG heat strip. Default: OUTPUT with .png in place of .html.")
@click.option("--frame-size", type=click.IntRange(1, 1 << 26), default=1 << 20, show_default=True,
              help="Frame size to cost the file with (as `lcodec pack --frame-size`).")
@click.option("--view-bytes", type=click.IntRange(1, 1 << 24), default=None,
              help="Render at most this many bytes in the page (default 256 KiB of text, 64 KiB of hex); "
                   "totals always cover the whole file.")
@force_option
@quiet_option
@guarded
def explain(file, model, output, png_out, frame_size, view_bytes, force, quiet):
    """Show what every byte of FILE costs under the model, as `lcodec pack` would code it.

    Writes an HTML page: a heat map of bits per byte over the text (a hex view for
    binary files), the most expensive 64-byte regions, and the totals (sum of symbol
    costs, the packed archive's real size, bits per byte); and a PNG heat strip.
    """
    if os.path.isdir(file):
        raise UsageError(f"{file} is a folder; explain takes one file")
    data = read_input(file)
    from .measure import explain as X

    png_out = png_out or X.default_png_path(output)
    if os.path.abspath(png_out) == os.path.abspath(output):
        raise UsageError("--png and -o/--output name the same file")
    if os.path.abspath(file) in (os.path.abspath(output), os.path.abspath(png_out)):
        raise UsageError("the output would overwrite the input")
    for out in (output, png_out):
        if os.path.lexists(out) and not force:
            raise UsageError(f"{out} exists; pass --force to overwrite it")
    X.require_matplotlib()
    bar = Progress(2 * len(data), "explaining", quiet)
    ex = X.explain(data, model, frame_size, bar)
    bar.close()
    png = X.heat_png(ex)
    page = X.render_html(ex, os.path.basename(file), view_bytes, png)
    atomic_write(png_out, png, force=force, mode=X.readable_mode())
    atomic_write(output, page.encode("utf-8"), force=force, mode=X.readable_mode())
    if not quiet:
        click.echo(f"{ex.raw_bytes} bytes: {ex.total_bits:,.0f} bits under the model ({ex.bits_per_byte:.3f} bits "
                   f"per byte); packed {ex.archive_bytes} bytes ({ex.archive_bits_per_byte:.3f} bits per byte); "
                   f"wrote {output} and {png_out}", err=True)


@main.command(epilog=_example("train"))
@click.argument("corpus", nargs=-1, required=True)
@click.option("-o", "--output", "output", required=True, type=click.Path(dir_okay=False), help="Model file to write.")
@click.option("--kind", type=click.Choice(["bytes", "image"]), default="bytes", show_default=True,
              help="bytes: a byte model (braid or weft, by --preset) on any files; image: the pixel model "
                   "(tessel) on image files (PGM/PPM, PNG, NPY, uncompressed TIFF, DICOM).")
@click.option("--time-limit", type=click.FloatRange(1, 7 * 86400), default=None,
              help="Stop training after this many seconds (earlier if validation stops improving). "
                   "Default: 600 for bytes, 120 for images.")
@click.option("--preset", default=None,
              help="Byte models: braid (corpus statistics braided with per-file adaptation; the default), "
                   "braid-tree (braid plus a refinement of each byte's binary tree: about 4.5% smaller, about a quarter slower to "
                   "decode), braid-lean (smaller, faster), or the neural model weft: preset weft (hashed contexts), small, "
                   "tiny (need torch). "
                   "Images: small (the default) or tiny. Figures in README.md.")
@click.option("--seed", type=int, default=0, show_default=True, help="Seed of the validation split and the training.")
@click.option("--max-bytes", type=int, default=None, help="Read at most this many bytes of the corpus (bytes only).")
@click.option("--memory", "memory", default=None, metavar="SIZE",
              help="braid presets: how much of the training text the model file keeps as its corpus memory, "
                   "so that new files can be coded as references to long strings of the old ones (for example "
                   "64M, 512K, or 0 for none; default 32M, braid-lean 0). The text is stored as it is: anyone "
                   "with the model file can read it.")
@click.option("--adapt-k", default="4096", show_default=True,
              help="Images: prior strength K of the per-image adaptive counts (0 = off), or 'auto' to pick it "
                   "per depth on the validation images.")
@click.option("--structure-k", type=click.IntRange(0, 65536), default=32, show_default=True,
              help="Images: prior strength of the per-image structure counts (position parity, equal neighbours; "
                   "0 = off, which also turns off the blended first stage).")
@click.option("--law/--no-law", default=True, show_default=True,
              help="Images: the third stage of 16-bit samples, a two-sided geometric law of the residual whose "
                   "scale each image learns per activity class (small or noisy scans).")
@click.option("--record-names", is_flag=True,
              help="List the training files' names (relative to the corpus arguments) in the model file. "
                   "Without it the model file records only their count, bytes and a digest of the listing; "
                   "it never records a path.")
@click.option("--augment/--no-augment", default=True, show_default=True,
              help="Images: train also on each training image mirrored, flipped and transposed (while the "
                   "training samples stay under 16.8 million); decoding costs nothing more.")
@click.option("--colour", type=click.Choice(["shift", "rct", "rct-grad"]), default="rct-grad", show_default=True,
              help="Images: how RGB is seen. shift: each channel's prediction plus the residual of the channel "
                   "before; rct: coded as G, then the chroma B - G and R - G of the reversible component "
                   "transform (ITU-T T.800 Annex G), each predicted in its own plane; rct-grad: rct, and an 8-bit chroma "
                   "sample also sees how G changes from its left and upper neighbours.")
@click.option("--predictor", type=click.Choice(["med", "gap"]), default="gap", show_default=True,
              help="Images: the fixed predictor under the network. med: the median edge detector; gap: "
                   "gradient-adjusted prediction.")
@force_option
@guarded
def train(corpus, output, kind, time_limit, preset, seed, max_bytes, memory, adapt_k, structure_k, law, record_names,
          augment, colour, predictor, force):
    """Train a model on files and folders of one kind; write a model file.

    A tenth of the files is held out for validation; progress shows validation bits per
    byte (or per symbol); the command ends with the exported integer model's validation
    figures. The weft and image presets need torch (scripts/setup.sh installs it); packing
    and unpacking with any model file do not. With --kind image, images are coded as
    pixels by `pack -m MODEL` (see README.md, "Images").
    """
    from .training import train as T

    def echo(m):
        errors.raise_pending()  # each progress line is a point where a lost signal stops training
        click.echo(m, err=True)

    if kind == "image":
        if max_bytes is not None or memory is not None:
            raise UsageError("--max-bytes and --memory go with --kind bytes")
        T.train_image(list(corpus), output, time_limit or 120.0, preset or "small", seed, echo=echo, force=force,
                      adapt_k=adapt_k, structure_k=structure_k, law=law, augment=augment, record_names=record_names,
                      colour=colour, predictor=predictor)
    else:
        T.train(list(corpus), output, time_limit or 600.0, preset or T.DEFAULT_PRESET, seed, max_bytes, echo=echo,
                force=force, memory=None if memory is None else parse_size(memory, "--memory"),
                record_names=record_names)


@main.command(epilog=_example("demo"))
@click.option("--workdir", type=click.Path(file_okay=False), default="lcodec-demo", show_default=True,
              help="Where the demo corpus and archive are written.")
@click.option("--scale", type=click.FloatRange(0.01, 20), default=1.0, show_default=True, help="Corpus size factor.")
@quiet_option
@guarded
def demo(workdir, scale, quiet):
    """The main job on the bundled demo corpus: make the corpus, pack the test split,
    verify it, and compare against general compressors."""
    from . import demo as D

    D.run(workdir, scale, echo=lambda m: click.echo(m), quiet=quiet)


if __name__ == "__main__":
    main()
