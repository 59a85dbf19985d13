"""A recording process for the reliability tests: appends readings and acknowledges each one.

``python tests/reliability/writer.py ARCHIVE SESSION_ID COUNT [EVENT_EVERY] [TAG]`` appends COUNT
readings (invented demo data) to one session and prints ``ack READING_ID`` on stdout, flushed, only
AFTER ``append_reading`` has returned (ARCHIVE is a file path or a ``postgresql://`` URL, opened
by :func:`labkit.logbook.open.open_archive` as every front end opens it); every EVENT_EVERY readings
it also appends an event (which shares ``seq``) and every 7th reading after the first is followed by a correction of
the previous one (acknowledged as ``ack READING_ID:REVISION``). A :class:`NotRecordedError` or any
other error ends the process with exit code 3 and the message on stderr.

Only the archive's writing path is imported (no pandas), so the process starts quickly.
"""

from __future__ import annotations

import sys
import uuid
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from labkit.logbook.open import open_archive


def main(argv: list[str]) -> int:
    """Run the writer; the exit code."""
    path, session_id, count = argv[0], argv[1], int(argv[2])
    event_every = int(argv[3]) if len(argv) > 3 else 0
    tag = argv[4] if len(argv) > 4 else "w"
    out = sys.stdout
    try:
        archive = open_archive(path)
        previous = None
        for k in range(count):
            row = {
                "reading_id": uuid.uuid4().hex, "revision": 0, "supersedes": -1, "session_id": session_id,
                "section": "S01", "group": "G1", "cart": "cart-01", "step_id": f"step-{k % 5}",
                "step_index": k % 5, "step_kind": "load_step", "location": "B2", "quantity": "v_rms", "unit": "V",
                "predicted": 230.0, "band_low": 226.0, "band_high": 233.5, "tolerance": 2.0,
                "measured": 228.0 + (k % 10) * 0.1, "entered": f"{228.0 + (k % 10) * 0.1:.1f}", "form": "rms",
                "meter_range": 600.0, "obtained": "typed", "sensor": "", "verdict": "accept", "diagnosis": "",
                "diagnosis_code": "", "anchor": "nominal", "capture_id": "", "recorded_by": tag, "reason": "",
                "note": "invented demo reading",
            }
            done = archive.append_reading(row)
            out.write(f"ack {done['reading_id']}\n")
            out.flush()
            if previous is not None and k % 7 == 0:
                fix = dict(previous, revision=previous["revision"] + 1, supersedes=previous["revision"],
                           measured=previous["measured"] + 0.5, reason="re-read by the writer test")
                fix.pop("seq")
                fix.pop("recorded_at")
                fixed = archive.append_reading(fix)
                out.write(f"ack {fixed['reading_id']}:{fixed['revision']}\n")
                out.flush()
            previous = done
            if event_every and (k + 1) % event_every == 0:
                archive.append_event({"session_id": session_id, "by": tag, "role": "student", "event": "note",
                                      "detail": '{"text": "invented demo note"}'})
        archive.close()
    except Exception as exc:  # the test reads the reason from stderr
        print(f"{type(exc).__name__}: {exc}", file=sys.stderr)
        return 3
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
