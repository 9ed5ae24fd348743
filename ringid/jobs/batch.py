"""Several samples per workflow job: how samples are cut into batches, the batch manifest, and
the two batch loops (image work, identification) that run in one interpreter.

A batch is a run of consecutive sample ids in sorted order (``make_batches``), so the cut
depends only on the ids and ``batch_size``, never on the order of the sheet's rows. The
per-sample work is ``ringid.jobs.measure.measure_sample`` and ``identify_sample``, called one sample
after another (one image in memory at a time), and every sample's files are exactly those of
``ringid measure`` and ``ringid identify`` run on it alone. A sample whose work raises anything
is recorded as failed in its own files and the loop goes on with the next one.

Every workflow run goes through batches; ``batch_size: 1`` makes batches of one sample each.
The manifest of a batch is a sample sheet (``sample,image,calibration,voltage_kv,note,elements``) with
absolute image paths, read back with ``ringid.jobs.sheets``; the workflow feeds it on stdin.
This module imports only the standard library at module level (the workflow imports it when it
starts).
"""

from __future__ import annotations

import csv
import math
import os
import sys
import time
from dataclasses import dataclass

MANIFEST_COLUMNS = ["sample", "image", "calibration", "voltage_kv", "note", "elements"]


def make_batches(sample_ids, batch_size: int) -> dict[str, list[str]]:
    """``{batch id: sample ids}``: sorted ids cut into consecutive chunks of ``batch_size``.

    Batch ids are ``b001``, ``b002``, ... (zero-padded to at least 3 digits); with ``batch_size``
    1 each batch is named after its sample, so a sample added to the sheet changes no other
    batch's name or membership (a batch's jobs rerun when its membership changes).
    """
    if int(batch_size) != batch_size or batch_size < 1:
        raise ValueError(f"batch_size must be an integer >= 1, got {batch_size!r}")
    ids = sorted(sample_ids)
    if batch_size == 1:
        return {s: [s] for s in ids}
    chunks = [ids[i : i + batch_size] for i in range(0, len(ids), batch_size)]
    width = max(3, len(str(len(chunks))))
    return {f"b{k + 1:0{width}d}": chunk for k, chunk in enumerate(chunks)}


def manifest_text(rows) -> str:
    """The manifest (CSV text) of sample-sheet rows (``ringid.jobs.sheets.SampleRow``).

    The voltage is written with ``%g``, as ``ringid measure --voltage-kv`` would take it; the
    elements as their symbols separated by spaces.
    """
    import io

    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(MANIFEST_COLUMNS)
    for r in rows:
        w.writerow(
            [r.sample, r.image, r.calibration, f"{r.voltage_kv:g}" if math.isfinite(r.voltage_kv) else "", r.note,
             " ".join(r.elements)]
        )
    return buf.getvalue()


def read_manifest(manifest: str | os.PathLike, stdin=None) -> list:
    """The rows (``SampleRow``) of a manifest file, or of the manifest text on ``stdin`` for ``-``."""
    import tempfile

    from ringid.jobs.sheets import read_samples

    if str(manifest) != "-":
        return list(read_samples(manifest).values())
    text = (stdin or sys.stdin).read()
    with tempfile.TemporaryDirectory(prefix="ringid-batch-") as tmp:
        path = os.path.join(tmp, "manifest.csv")
        with open(path, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)
        return list(read_samples(path).values())


@dataclass(frozen=True)
class ImageOptions:
    """The image-job options shared by every sample of a batch (``ringid measure``'s options)."""

    max_pixels: int | None = None
    saturation_level: float | None = None
    user_mask: str | None = None
    min_ring_g_per_nm: float = 1.0
    frame: int | None = None
    negative_floor: float | None = None


def measurement_summary(rec) -> str:
    """One line of a sample record: crystallinity, rings and size (nm), e.g. ``crystalline, 17 rings, 17.7 nm``."""
    parts = [rec.crystallinity, f"{rec.n_rings} rings"]
    if rec.crystallite_size_nm:
        parts.append(f"{rec.crystallite_size_nm:.3g} nm")
    elif rec.crystallite_size_lower_limit_nm:
        parts.append(f"> {rec.crystallite_size_lower_limit_nm:.3g} nm")
    return ", ".join(parts)


def measure_batch(rows, calibrations_dir: str, samples_dir: str, options: ImageOptions, log=sys.stderr) -> list:
    """The image job of every sample row (``read_manifest``), one after another; returns their records.

    Sample ``s`` is written to ``samples_dir/s`` with the calibration record
    ``calibrations_dir/{calibration}.json``. A sample whose files could not be written at all
    gets a record with ``status`` ``unwritten`` in the returned list (:class:`ringid.core.records.SampleRecord`).
    """
    from ringid.core.records import SampleRecord
    from ringid.jobs.measure import _error_text, measure_sample, write_failed_sample

    records = []
    rows = list(rows)
    for k, row in enumerate(rows, start=1):
        where = f"[{k}/{len(rows)}] {row.sample}"
        out = os.path.join(samples_dir, row.sample)
        t0 = time.perf_counter()
        try:
            rec = measure_sample(row.image, os.path.join(calibrations_dir, f"{row.calibration}.json"), out,
                                 sample=row.sample, calibration_id=row.calibration, note=row.note,
                                 voltage_kv=row.voltage_kv, max_pixels=options.max_pixels,
                                 saturation_level=options.saturation_level, user_mask=options.user_mask,
                                 frame=options.frame, negative_floor=options.negative_floor,
                                 min_ring_g_per_nm=options.min_ring_g_per_nm, elements=row.elements)
        except Exception as exc:  # noqa: BLE001 - one sample's failure never stops the batch
            try:
                rec = write_failed_sample(out, exc, sample=row.sample, image=row.image, calibration_id=row.calibration,
                                          note=row.note, elapsed_s=time.perf_counter() - t0)
            except Exception as exc2:  # noqa: BLE001 - not even the failure could be written
                rec = SampleRecord(row.sample, status="unwritten", error=_error_text(exc2))
        records.append(rec)
        if rec.status == "ok":
            print(f"{where}: {measurement_summary(rec)} ({rec.timings_s['total']:.2f} s)", file=log, flush=True)
        elif rec.status == "failed":
            print(f"{where}: ringid: warning: {rec.error} (recorded as failed)", file=log, flush=True)
        else:
            print(f"{where}: ringid: error: {out}: could not write the sample's files: {rec.error}", file=log,
                  flush=True)
    return records


def identify_batch(sample_dirs, library, *, window_standard: float, window_nominal: float, library_dir: str,
                   false_identification_rate: float = 0.01, log=sys.stderr) -> list[dict]:
    """The identification of every measured sample folder in ``sample_dirs`` against one loaded
    ``library``; returns the identification records (``status: unwritten`` as in ``measure_batch``)."""
    from ringid.jobs.measure import (
        _error_text,
        identification_summary,
        identify_sample,
        library_index,
        write_failed_identification,
    )

    from ringid.library.store import unavailable_phases

    index = library_index(library, window_standard, window_nominal)  # once: the decoys are the costly part
    unavailable = unavailable_phases(library_dir) if library_dir else []
    records = []
    sample_dirs = list(sample_dirs)
    for k, d in enumerate(sample_dirs, start=1):
        where = f"[{k}/{len(sample_dirs)}] {os.path.basename(os.path.normpath(d))}"
        try:
            out = identify_sample(d, index, window_standard=window_standard, window_nominal=window_nominal,
                                  false_identification_rate=false_identification_rate, library_dir=library_dir,
                                  unavailable=unavailable)
        except Exception as exc:  # noqa: BLE001 - one sample's failure never stops the batch
            try:
                out = write_failed_identification(d, exc)
            except Exception as exc2:  # noqa: BLE001
                out = {"status": "unwritten", "error": _error_text(exc2)}
        records.append(out)
        if out.get("status") == "unwritten":
            print(f"{where}: ringid: error: {d}: could not write the identification files: {out['error']}", file=log,
                  flush=True)
        else:
            print(f"{where}: {identification_summary(out)}", file=log, flush=True)
    return records


def crash_reason(status: int, log: str = "") -> str:
    """Why a job stopped, from its shell exit status (128 + N: killed by signal N), for the failed
    records of the items it left unwritten; ``log`` names the job's log."""
    import signal

    if status > 128:
        try:
            name = signal.Signals(status - 128).name
        except ValueError:
            name = f"signal {status - 128}"
        what = f"killed by {name}" + (" (e.g. by the system for lack of memory)" if name == "SIGKILL" else "")
    else:
        what = f"it exited with status {status}"
    return f"the job stopped before this item was written ({what})" + (f"; see {log}" if log else "")


def record_unfinished_measurements(rows, samples_dir: str, reason: str) -> list[str]:
    """After an image job died: a failed sample folder (with ``reason``) for every sample of its
    manifest rows that has no ``sample.json``; the ids recorded."""
    from ringid.core.errors import RingidError
    from ringid.jobs.measure import write_failed_sample

    done = []
    for row in rows:
        out = os.path.join(samples_dir, row.sample)
        if not os.path.isfile(os.path.join(out, "sample.json")):
            write_failed_sample(out, RingidError(None, reason), sample=row.sample, image=row.image,
                                calibration_id=row.calibration, note=row.note)
            done.append(row.sample)
    return done


def record_unfinished_identifications(sample_dirs, reason: str) -> list[str]:
    """After an identification job died: failed identification files (with ``reason``) for every
    sample folder without ``identification.json``; the folders recorded."""
    from ringid.core.errors import RingidError
    from ringid.jobs.measure import write_failed_identification

    done = []
    for d in sample_dirs:
        if not os.path.isfile(os.path.join(d, "identification.json")):
            write_failed_identification(d, RingidError(None, reason))
            done.append(d)
    return done
