"""COMTRADE (IEEE C37.111-1999 / -2013): hand-built fixtures read by labkit; labkit's files read by `comtrade`."""

from __future__ import annotations

import struct
from pathlib import Path

import numpy as np
import pytest

from labkit.captures.capture import Capture, analyze_capture
from labkit.captures.comtrade import read_comtrade, write_comtrade
from labkit.core.errors import CaptureError

DATA = Path(__file__).parent / "data" / "captures"


def test_hand_built_ascii_1999_two_rate_sections_timemult_scaling():
    # Fixture tests/data/captures/two_rates_1999.cfg, written by hand after the C37.111-1999 .cfg layout:
    #   line 1  station_name,rec_dev_id,rev_year            -> "bench demo,rec01,1999"
    #   line 2  TT,##A,##D                                  -> 3 channels: 2 analog, 1 status
    #   line 3  An,ch_id,ph,ccbm,uu,a,b,skew,min,max,primary,secondary,PS
    #           VA in kV, a = 0.5, b = 1.0 (value = a*x + b), primary values (P)
    #   line 4  IA in A, a = 0.01, b = 0, skew 25 us, primary 400 / secondary 1, values are secondary (S)
    #   line 5  Dn,ch_id,ph,ccbm,y                          -> status channel TRIP
    #   line 6  lf = 60 Hz;  line 7  nrates = 2
    #   line 8  samp,endsamp = 1000 Hz to sample 6;  line 9  500 Hz to sample 10
    #   lines 10-11 first data point / trigger point dd/mm/yyyy,hh:mm:ss.ssssss
    #   line 12 ft = ASCII;  line 13 timemult = 2 (timestamps count 2 us)
    # .dat rows: n,timestamp,A1,A2,D1 (timestamps 0, 500, ... in units of 2 us).
    rec = read_comtrade(DATA / "two_rates_1999.cfg")
    assert rec.revision == "1999"
    assert rec.file_type == "ASCII"
    assert rec.timemult == 2.0
    assert rec.rates == ((1000.0, 6), (500.0, 10))
    codes_v = np.array([0, 10, 20, -10, -20, 4, 6, 8, 2, -2])
    codes_i = np.array([100, -100, 50, -50, 0, 25, 75, -25, 10, -10])
    np.testing.assert_allclose(rec.data[0], (0.5 * codes_v + 1.0) * 1000.0)  # kV -> V
    np.testing.assert_allclose(rec.data[1], 0.01 * codes_i * 400.0)  # secondary -> primary
    assert rec.units == ("V", "A")
    expected_t = np.array([0, 1, 2, 3, 4, 5, 7, 9, 11, 13]) * 1e-3
    np.testing.assert_allclose(rec.time, expected_t, atol=1e-12)
    np.testing.assert_allclose(rec.timestamps, expected_t, atol=1e-12)  # timestamp * timemult agrees
    first, second = rec.captures()
    assert (first.sample_rate, first.samples, second.sample_rate, second.samples) == (1000.0, 6, 500.0, 4)
    assert second.t0 == pytest.approx(7e-3)
    assert first.delays_s[1] == pytest.approx(-25e-6)  # sampled 25 us late relative to the stamp: leads
    with pytest.raises(CaptureError, match="2 sampling-rate sections"):
        rec.capture()
    secondary = read_comtrade(DATA / "two_rates_1999.cfg", values="secondary")
    np.testing.assert_allclose(secondary.data[1], 0.01 * codes_i)


def test_hand_fixture_agrees_with_the_comtrade_package():
    # Independent reader: the `comtrade` package (PyPI) on the same hand-built file: time axis and a*x+b values.
    import comtrade

    ref = comtrade.Comtrade()
    ref.load(str(DATA / "two_rates_1999.cfg"), str(DATA / "two_rates_1999.dat"))
    rec = read_comtrade(DATA / "two_rates_1999.cfg", values="as_recorded")
    np.testing.assert_allclose(np.asarray(ref.time), rec.time, atol=1e-9)
    np.testing.assert_allclose(np.asarray(ref.analog[0]) * 1000.0, rec.data[0])  # labkit gives V for kV
    np.testing.assert_allclose(np.asarray(ref.analog[1]), rec.data[1])


def _binary_2013_fixture(tmp_path: Path, file_type: str = "BINARY") -> tuple[Path, np.ndarray]:
    """A BINARY (16-bit) or FLOAT32 record built byte by byte after the C37.111-2013 layout."""
    fs, f, n = 4000.0, 60.0, 400  # 6 cycles
    t = np.arange(n) / fs
    volts = 169.7 * np.cos(2 * np.pi * f * t)
    amps = 7.07 * np.cos(2 * np.pi * f * t - np.radians(30))
    a_v, b_v = 0.01, 0.5  # value = a*x + b
    a_i, b_i = 0.001, 0.0
    cfg = "\r\n".join([
        "bench demo,rec02,2013",  # station_name,rec_dev_id,rev_year
        "4,2A,2D",  # TT,##A,##D
        f"1,VB1,A,bus B1,V,{a_v},{b_v},0,-32767,32767,1,1,P",  # An,ch_id,ph,ccbm,uu,a,b,skew,min,max,prim,sec,PS
        f"2,IL,A,load,A,{a_i},{b_i},0,-32767,32767,1,1,P",
        "1,BRK,,,0",  # Dn,ch_id,ph,ccbm,y
        "2,SYNC,,,0",
        "60",  # lf
        "1",  # nrates
        f"{fs:g},{n}",  # samp,endsamp
        "01/01/2000,00:00:00.000000",  # start
        "01/01/2000,00:00:00.000000",  # trigger
        file_type,  # ft
        "1",  # timemult
        "+0h00,0",  # time_code,local_code (2013)
        "0,0",  # tmq_code,leapsec (2013)
    ]) + "\r\n"
    (tmp_path / "b2013.cfg").write_text(cfg)
    out = bytearray()
    for k in range(n):
        # record: sample number uint32, timestamp uint32 (us), analog int16 (or float32) each, status uint16 words
        out += struct.pack("<II", k + 1, round(k * 1e6 / fs))
        if file_type == "BINARY":
            out += struct.pack("<hh", round((volts[k] - b_v) / a_v), round((amps[k] - b_i) / a_i))
        else:
            out += struct.pack("<ff", (volts[k] - b_v) / a_v, (amps[k] - b_i) / a_i)
        out += struct.pack("<H", 0b10 if k > 200 else 0)
    (tmp_path / "b2013.dat").write_bytes(bytes(out))
    return tmp_path / "b2013.cfg", np.vstack([volts, amps])


@pytest.mark.parametrize("file_type", ["BINARY", "FLOAT32"])
def test_hand_built_binary_2013(tmp_path, file_type):
    cfg, truth = _binary_2013_fixture(tmp_path, file_type)
    rec = read_comtrade(cfg)
    assert rec.revision == "2013"
    assert rec.file_type == file_type
    tol = 0.006 if file_type == "BINARY" else 1e-4  # half a code of a = 0.01 V
    np.testing.assert_allclose(rec.data, truth, atol=tol)
    cap = rec.capture()
    res = analyze_capture(cap, pairs=[("VB1", "IL")])
    assert res.frequency == pytest.approx(60.0, abs=1e-4)
    assert res.pairs[0].phase == pytest.approx(-30.0, abs=0.05)


def test_truncated_binary_is_refused(tmp_path):
    cfg, _ = _binary_2013_fixture(tmp_path)
    dat = cfg.with_suffix(".dat")
    dat.write_bytes(dat.read_bytes()[:-3])
    with pytest.raises(CaptureError, match="whole number of"):
        read_comtrade(cfg)


def _capture() -> Capture:
    fs = 5000.0
    t = np.arange(1000) / fs
    v = 120 * np.sqrt(2) * np.cos(2 * np.pi * 60 * t) + 3 * np.cos(2 * np.pi * 180 * t)
    i = 4 * np.sqrt(2) * np.cos(2 * np.pi * 60 * t - 0.4)
    return Capture(np.vstack([v, i]), fs, ("VB1", "IL12"), units=("V", "A"), delays_s=(0.0, 5e-5))


@pytest.mark.parametrize("revision", ["1999", "2013"])
@pytest.mark.parametrize("file_type", ["ASCII", "BINARY"])
def test_written_files_read_back_by_comtrade_package(tmp_path, revision, file_type):
    # Independent reader: the `comtrade` PyPI package reads labkit's .cfg/.dat.
    import comtrade

    cap = _capture()
    cfg, dat = write_comtrade(cap, tmp_path / "out", revision=revision, file_type=file_type)
    ref = comtrade.Comtrade()
    ref.load(str(cfg), str(dat))
    assert ref.rev_year == revision
    assert ref.analog_channel_ids == ["VB1", "IL12"]
    assert ref.cfg.sample_rates[0][0] == pytest.approx(5000.0)
    resolution = (cap.data.max(axis=1) - cap.data.min(axis=1)) / (2 * (32767 if file_type == "BINARY" else 99998))
    for k in range(2):
        np.testing.assert_allclose(np.asarray(ref.analog[k]), cap.data[k], atol=resolution[k] * 0.51)
    np.testing.assert_allclose(np.asarray(ref.time), np.arange(1000) / 5000.0, atol=1e-9)
    back = read_comtrade(cfg).capture()
    assert back.delays_s[1] == pytest.approx(5e-5)
    np.testing.assert_allclose(back.data, cap.data, atol=resolution.max() * 0.51)


def test_writer_refuses_unknown_revision(tmp_path):
    with pytest.raises(CaptureError, match="1999 or 2013"):
        write_comtrade(_capture(), tmp_path / "x", revision="1991")  # type: ignore[arg-type]
