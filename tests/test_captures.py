"""Capture files (CSV, .npz, WAV), channel map, calibration, live sources, simulated bench and the CLI."""

from __future__ import annotations

import argparse
import json
import os
import time
import zipfile

import numpy as np
import pytest

from labkit.captures.calibration import Calibration, MeterReading, calibrate_channel, calibrate_skew
from labkit.captures.capture import Capture, analyze_capture, read_capture
from labkit.captures.channelmap import ChannelBinding, ChannelMap, pairs_from_capture
from labkit.captures.csvio import format_csv, parse_csv_text, read_csv, write_csv
from labkit.captures.npzio import read_npz, write_npz
from labkit.captures.simulate import ChannelSpec, SimulatedBench
from labkit.captures.sources import CaptureSource, FolderWatcher, SerialLineSource
from labkit.captures.wavio import read_wav, write_wav
from labkit.cli.analyze import add_analyze_parser
from labkit.core.errors import CaptureError

SQ2 = np.sqrt(2.0)


def _bench(**kw) -> SimulatedBench:
    """Invented demo bench: 120 V bus, 5 A load current lagging 25 deg, 3rd harmonic in the current."""
    v = ChannelSpec([(1, 120.0 + 0j), (3, 2.0 * np.exp(1j * 0.3))], "voltage", "B1")
    i = ChannelSpec([(1, 5.0 * np.exp(-1j * np.radians(25))), (3, 0.5 + 0j)], "current", "LD1@B1")
    return SimulatedBench({"v": v, "i": i}, sample_rate=10_000.0, frequency=60.0, samples=10_000, **kw)


# --- CSV ------------------------------------------------------------------------------------------------------


def test_csv_round_trip_with_time_column(tmp_path):
    cap = _bench().capture()
    path = write_csv(cap, tmp_path / "c.csv")
    back = read_csv(path)
    assert back.channels == ("v", "i")
    assert back.sample_rate == pytest.approx(10_000.0, rel=1e-9)
    np.testing.assert_allclose(back.data, cap.data, rtol=1e-9, atol=1e-9)


def test_csv_rate_from_header_argument_and_conflicts():
    text = "# sample_rate = 2 kHz\nv,i\n" + "\n".join(f"{np.cos(k / 5):.6f},{np.sin(k / 5):.6f}" for k in range(50))
    assert parse_csv_text(text).sample_rate == 2000.0
    bare = text.split("\n", 1)[1]
    assert parse_csv_text(bare, rate=500.0).sample_rate == 500.0
    with pytest.raises(CaptureError, match="no sample rate"):
        parse_csv_text(bare)
    with pytest.raises(CaptureError, match="disagrees"):
        parse_csv_text(text, rate=1000.0)
    with pytest.raises(CaptureError, match="sample_rate = 2000"):
        parse_csv_text("# sample_rate = 2000\nv\n1\n2\n")


def test_csv_dropped_sample_and_missing_value_are_located():
    rows = [f"{k / 1000:.4f},{np.cos(k / 3):.5f}" for k in range(100)]
    del rows[40]
    with pytest.raises(CaptureError, match="dropped sample"):
        parse_csv_text("time_s,v\n" + "\n".join(rows))
    rows = [f"{np.cos(k / 3):.5f},{np.sin(k / 3):.5f}" for k in range(100)]
    rows[10] = "0.5,"
    with pytest.raises(CaptureError, match=r"line 12, column i"):
        parse_csv_text("v,i\n" + "\n".join(rows), rate=1000.0, source="x.csv")


def test_file_above_size_limit_is_refused(tmp_path):
    path = write_csv(_bench().capture(), tmp_path / "big.csv")
    size = path.stat().st_size
    with pytest.raises(CaptureError, match=f"{size:,} bytes, above the limit of 1,000 bytes"):
        read_capture(path, max_bytes=1000)


# --- npz ------------------------------------------------------------------------------------------------------


def test_npz_round_trip_and_decompressed_size_cap(tmp_path):
    cap = _bench().capture()
    path = write_npz(cap, tmp_path / "c.npz")
    back = read_npz(path)
    np.testing.assert_array_equal(back.data, cap.data)
    assert back.channels == cap.channels
    # compresses well: the file is small, the payload is not; the cap applies to the payload
    zeros = tmp_path / "z.npz"
    np.savez_compressed(zeros, data=np.zeros((2, 200_000)), sample_rate=1000.0)
    assert zeros.stat().st_size < 100_000
    with pytest.raises(CaptureError, match="decompressed size"):
        read_npz(zeros, max_bytes=1_000_000)


def test_npz_with_pickled_objects_is_refused(tmp_path):
    path = tmp_path / "p.npz"
    np.savez(path, data=np.zeros((1, 10)), sample_rate=1.0, channels=np.array([{"a": 1}], dtype=object))
    with pytest.raises(CaptureError, match="pickle"):
        read_npz(path)
    with zipfile.ZipFile(path) as z:
        assert "channels.npy" in z.namelist()


# --- WAV ------------------------------------------------------------------------------------------------------


def test_wav_is_ac_coupled_and_clipping_uses_converter_limits(tmp_path):
    fs = 8000.0
    t = np.arange(8000) / fs
    left = 0.5 * np.cos(2 * np.pi * 60 * t)
    right = np.clip(1.3 * np.cos(2 * np.pi * 60 * t - 0.5), -1, 1)
    path = write_wav(Capture(np.vstack([left, right]), fs, ("a", "b")), tmp_path / "s.wav")
    cap = read_wav(path)
    assert cap.ac_coupled
    assert cap.channels == ("left", "right")
    res = analyze_capture(cap, pairs=[("left", "right")])
    assert np.isnan(res.pairs[0].v_dc)
    assert not res.dc_available
    codes = {w.code: w.channel for w in res.warnings}
    assert codes["clipped"] == "right"
    assert "dc_unavailable" in codes
    assert res.pairs[0].v_rms == pytest.approx(0.5 / SQ2, rel=1e-4)


# --- channel map and calibration ---------------------------------------------------------------------------


def test_channel_map_scales_offsets_signs_and_pairs():
    fs = 10_000.0
    t = np.arange(5000) / fs
    raw_v = 0.01 * 120 * SQ2 * np.cos(2 * np.pi * 60 * t) + 0.002  # 100:1 divider, 2 mV offset
    raw_i = -0.1 * 5 * SQ2 * np.cos(2 * np.pi * 60 * t - 0.5)  # 100 mV/A clamp mounted reversed
    cap = Capture(np.vstack([raw_v, raw_i]), fs, ("a0", "a1"))
    cmap = ChannelMap.of([ChannelBinding("a0", "VS1", "B1", "voltage", 0.01, offset=0.002),
                          ChannelBinding("a1", "CS1", "L12@B1", "current", 0.1, sign=-1)])
    mapped = cmap.apply(cap)
    assert mapped.units == ("V", "A")
    assert mapped.kinds == ("voltage", "current")
    pairs = pairs_from_capture(mapped)
    assert [(p.voltage, p.current, p.location) for p in pairs] == [(0, 1, "L12@B1")]
    res = analyze_capture(mapped)
    p = res.pair("L12@B1")
    assert p.v_rms == pytest.approx(120.0, rel=1e-6)
    assert p.i_rms == pytest.approx(5.0, rel=1e-6)
    assert p.phase == pytest.approx(-np.degrees(0.5), abs=1e-6)
    assert ChannelMap.from_json(cmap.to_json()) == cmap
    with pytest.raises(CaptureError, match="V/A"):
        ChannelBinding("a1", "CS1", "B1", "current", 0.0)


def test_calibration_gain_offset_skew_round_trip_through_the_map():
    # A channel reading 2 % high with a 0.5 V offset and a current sampled 150 us late, against a reference
    # meter (120.0 V true RMS, +-(0.5 % rdg + 0.1 % FS of 600 V)) and a resistive load (I in phase with V).
    fs = 10_000.0
    t = np.arange(20_000) / fs
    true_v = 120 * SQ2 * np.cos(2 * np.pi * 60 * t)
    measured_v = 1.02 * true_v + 0.5
    late_i = 3 * SQ2 * np.cos(2 * np.pi * 60 * (t - 150e-6))
    cap = Capture(np.vstack([measured_v, late_i]), fs, ("v", "i"))
    meter = MeterReading(120.0, "DMM-demo", "rms", pct_reading=0.5, pct_full_scale=0.1, full_scale=600.0)
    cal_v = calibrate_channel(cap, "v", meter)
    assert cal_v.gain == pytest.approx(1 / 1.02, rel=1e-6)
    assert cal_v.offset == pytest.approx(0.5, abs=1e-6)
    assert cal_v.gain_uncertainty == pytest.approx((0.6 + 0.6) / 120.0)
    cal_i = calibrate_skew(cap, "v", "i", expected_phase_deg=0.0)
    assert cal_i.delay_s == pytest.approx(150e-6, rel=1e-4)
    stored = [Calibration.from_json(c.to_json()) for c in (cal_v, cal_i)]
    cmap = ChannelMap.of([ChannelBinding("v", "VS1", "B1", "voltage"), ChannelBinding("i", "CS1", "B1", "current")])
    for c in stored:
        cmap = cmap.with_calibration(c)
    later = Capture(np.vstack([measured_v[::-1].copy(), late_i]), fs, ("v", "i"))  # a later capture
    p = analyze_capture(cmap.apply(later)).pairs[0]
    assert p.v_rms == pytest.approx(120.0, rel=1e-6)
    assert abs(p.v_dc) < 1e-6
    res = analyze_capture(cmap.apply(cap)).pairs[0]
    assert res.phase == pytest.approx(0.0, abs=1e-3)


# --- simulated bench ----------------------------------------------------------------------------------------


def test_simulated_bench_recovers_its_spectrum_and_is_seeded():
    bench = _bench()
    cap = bench.capture()
    p = analyze_capture(cap).pair("LD1@B1")
    assert p.v1_rms == pytest.approx(120.0, rel=1e-9)
    assert p.phase == pytest.approx(-25.0, abs=1e-7)
    assert p.thd_i == pytest.approx(0.1, rel=1e-7)
    nxt = bench.capture()
    assert nxt.t0 == pytest.approx(1.0)
    noisy = dict(snr_db=40.0, gain_error=0.01, adc_bits=12, adc_range=200.0)
    spec_v = ChannelSpec([(1, 120.0 + 0j)], "voltage", "B1", **noisy)
    spec_i = ChannelSpec([(1, 5.0 + 0j)], "current", "B1", snr_db=40.0, adc_bits=12, adc_range=10.0)
    a = SimulatedBench({"v": spec_v, "i": spec_i}, frequency=60.2, seed=3).capture()
    b = SimulatedBench({"v": spec_v, "i": spec_i}, frequency=60.2, seed=3).capture()
    np.testing.assert_array_equal(a.data, b.data)
    q = analyze_capture(a).pairs[0]
    assert q.v1_rms == pytest.approx(121.2, rel=1e-3)  # 1 % gain error
    assert q.frequency == pytest.approx(60.2, abs=1e-3)
    step = 400.0 / 4096
    assert np.allclose(np.round(a.data[0] / step) * step, a.data[0])  # quantized to the 12-bit step
    assert isinstance(_bench(), CaptureSource)


def test_simulated_adc_range_clips_and_is_flagged():
    spec = ChannelSpec([(1, 120.0 + 0j)], "voltage", "B1", adc_bits=12, adc_range=150.0)
    spec_i = ChannelSpec([(1, 2.0 + 0j)], "current", "B1", adc_bits=12, adc_range=10.0)
    cap = SimulatedBench({"v": spec, "i": spec_i}).capture()
    res = analyze_capture(cap)
    assert [w.channel for w in res.warnings if w.code == "clipped"] == ["v"]


# --- live sources -------------------------------------------------------------------------------------------


def test_folder_watcher_reads_only_complete_files_inside_the_folder(tmp_path):
    drop = tmp_path / "drop"
    drop.mkdir()
    text = format_csv(_bench().capture())
    watcher = FolderWatcher(drop)
    part = drop / "run1.csv"
    part.write_text(text[: len(text) // 2])
    assert watcher.poll() == []  # first sight: size not yet known stable
    part.write_text(text)
    os.utime(part, ns=(time.time_ns(), time.time_ns() + 1_000_000))
    assert watcher.poll() == []  # grew since the last poll
    got = watcher.poll()
    assert len(got) == 1
    assert got[0].channels == ("v", "i")
    assert watcher.poll() == []  # not read twice
    outside = tmp_path / "secret.csv"
    outside.write_text(text)
    (drop / "link.csv").symlink_to(outside)
    watcher.poll()
    assert watcher.poll() == []
    assert any("outside" in e for e in watcher.errors)


def test_folder_watcher_with_sentinel(tmp_path):
    watcher = FolderWatcher(tmp_path, sentinel_suffix=".done")
    (tmp_path / "a.csv").write_text(format_csv(_bench().capture()))
    assert watcher.poll() == []
    (tmp_path / "a.csv.done").write_text("")
    assert len(watcher.poll()) == 1


def test_serial_line_source_through_a_pseudo_terminal():
    import serial  # pyserial

    master, slave = os.openpty()
    try:
        import tty

        tty.setraw(slave)
        port = serial.Serial(os.ttyname(slave), 115200, timeout=1.0)
        src = SerialLineSource(port, sample_rate=1000.0, channels=["v", "i"], block_samples=200)
        t = np.arange(400) / 1000.0
        lines = [f"{120 * SQ2 * np.cos(2 * np.pi * 50 * x):.4f},{5 * SQ2 * np.cos(2 * np.pi * 50 * x - 0.2):.4f}"
                 for x in t]
        lines.insert(250, "garbage,,")
        payload = ("\n".join(lines[:200]) + "\n" + "\n".join(lines[200:]) + "\n").encode()
        for k in range(0, len(payload), 1024):
            os.write(master, payload[k:k + 1024])
        first = src.read_capture()
        assert first is not None
        assert first.data.shape == (2, 200)
        np.testing.assert_allclose(first.data[0, :3], [float(v.split(",")[0]) for v in lines[:3]])
        # the block broken by the malformed line (50 good lines before it) is dropped; only 150 good lines follow,
        # so the read times out with no partial capture
        assert src.read_capture() is None
        assert src.dropped_blocks == 1
        os.write(master, ("\n".join(lines[:51]) + "\n").encode())
        third = src.read_capture()
        assert third is not None
        assert "dropped" in third.notes[0]
        port.close()
    finally:
        os.close(master)
        os.close(slave)


# --- CLI ----------------------------------------------------------------------------------------------------


def _cli(argv):
    parser = argparse.ArgumentParser(prog="labkit")
    add_analyze_parser(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(argv)
    return args.func(args)


def test_cli_json_keys_and_values(tmp_path, capsys):
    cap = _bench().capture()
    scaled = cap.with_changes(data=cap.data * np.array([[0.01], [0.1]]))  # sensor outputs: 0.01 V/V, 0.1 V/A
    path = write_csv(scaled, tmp_path / "cap.csv", time_column=False)
    code = _cli(["analyze", str(path), "--voltage", "v", "--current", "1", "--v-scale", "0.01", "--i-scale", "0.1",
                 "--format", "json"])
    assert code == 0
    out = json.loads(capsys.readouterr().out)
    for key in ("frequency_hz", "v_rms", "i_rms", "phase_deg", "p_w", "q1_var", "s_va", "pf", "dpf", "thd_v_pct",
                "thd_i_pct", "warnings", "ieee1459"):
        assert key in out
    assert out["phase_deg"] == pytest.approx(-25.0, abs=1e-5)
    assert out["thd_i_pct"] == pytest.approx(10.0, rel=1e-5)
    assert out["dpf"] == pytest.approx(np.cos(np.radians(25)), rel=1e-7)
    assert set(out["ieee1459"]) >= {"P", "P1", "PH", "Q1", "S", "S1", "SN", "DI", "DV", "SH", "DH", "N", "PF", "PF1"}
    assert _cli(["analyze", str(path), "--voltage", "v", "--current", "i", "--rate", "10000"]) == 0
    assert "pf1" in capsys.readouterr().out


def test_cli_bad_capture_exits_nonzero_with_reason(tmp_path, capsys):
    path = tmp_path / "short.csv"
    path.write_text("# sample_rate = 10000 Hz\nv,i\n" + "\n".join(f"{np.cos(k / 26.5)},{np.sin(k / 26.5)}"
                                                                   for k in range(200)))
    assert _cli(["analyze", str(path), "--voltage", "v", "--current", "i"]) == 1
    assert "cycles" in capsys.readouterr().err
    assert _cli(["analyze", str(path), "--voltage", "v", "--current", "nope"]) == 1
    assert 'no channel "nope"' in capsys.readouterr().err
