"""A minimal EDF+ writer built from the EDF+ specification (Kemp & Olivan 2003), for tests only:
it can write EDF+D (discontinuous) files, which the reader libraries do not write."""
from __future__ import annotations

import numpy as np


def _f(value, width: int) -> bytes:
    b = str(value).encode("ascii")
    assert len(b) <= width, (value, width)
    return b.ljust(width, b" ")


def write_edf_plus(path, signals_uv: np.ndarray, labels: list[str], fs: int, record_s: int,
                   onsets_s: list[float], discontinuous: bool = True) -> None:
    """``signals_uv``: (n_signals, n_records * fs * record_s) in uV; ``onsets_s``: start of each
    data record (a jump between consecutive onsets is a gap in the recording)."""
    n_sig = signals_uv.shape[0]
    spr = fs * record_s
    n_rec = len(onsets_s)
    ann_spr = 30                                    # 60 bytes of TALs per record
    ns = n_sig + 1
    head = b"".join([_f(0, 8), _f("X X X X", 80), _f("Startdate 02-DEC-2026 X X X", 80),
                     _f("02.12.26", 8), _f("22.00.00", 8), _f(256 * (ns + 1), 8),
                     _f("EDF+D" if discontinuous else "EDF+C", 44), _f(n_rec, 8),
                     _f(record_s, 8), _f(ns, 4)])
    labs = labels + ["EDF Annotations"]
    fields = [[_f(x, 16) for x in labs], [_f("AgAgCl electrode", 80)] * n_sig + [_f("", 80)],
              [_f("uV", 8)] * n_sig + [_f("", 8)], [_f(-3276.8, 8)] * n_sig + [_f(-1, 8)],
              [_f(3276.7, 8)] * n_sig + [_f(1, 8)], [_f(-32768, 8)] * ns,
              [_f(32767, 8)] * ns, [_f("HP:0.05Hz", 80)] * n_sig + [_f("", 80)],
              [_f(spr, 8)] * n_sig + [_f(ann_spr, 8)], [_f("", 32)] * ns]
    sig_head = b"".join(b"".join(col) for col in fields)
    digital = np.clip(np.round(signals_uv * 10), -32768, 32767).astype("<i2")  # 0.1 uV per count
    with open(path, "wb") as fh:
        fh.write(head + sig_head)
        for k in range(n_rec):
            for j in range(n_sig):
                fh.write(digital[j, k * spr:(k + 1) * spr].tobytes())
            tal = f"+{onsets_s[k]:g}".encode() + b"\x14\x14\x00"
            fh.write(tal.ljust(2 * ann_spr, b"\x00"))
