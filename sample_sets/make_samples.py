"""Write the invented demo data sets in this folder (seeded, so they are reproducible).

Every scenario and every number here is made up for demonstration; none of it is a
real measurement. Each file uses a different export dialect that
:func:`fitcore.read_table` understands. Run from anywhere::

    python sample_sets/make_samples.py

The files are byte-identical on every run (fixed seeds, fixed rounding, and the
dates inside the XLSX/ODS containers pinned), so they change only when the data do.
"""
from __future__ import annotations

import datetime as _dt
import re
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
FIXED_DATE = _dt.datetime(2024, 1, 1, 12, 0, 0)


def pin_zip_dates(path: Path) -> None:
    """Rewrite a workbook's ZIP entries with a fixed date, so equal data give equal bytes."""
    import io
    import zipfile

    src = zipfile.ZipFile(io.BytesIO(path.read_bytes()))
    out = io.BytesIO()
    stamp = FIXED_DATE.strftime("%Y-%m-%dT%H:%M:%SZ").encode()
    with zipfile.ZipFile(out, "w") as dst:
        for info in src.infolist():
            fixed = zipfile.ZipInfo(info.filename, date_time=FIXED_DATE.timetuple()[:6])
            fixed.compress_type = info.compress_type
            fixed.external_attr = info.external_attr
            data = src.read(info.filename)
            if info.filename == "docProps/core.xml":  # openpyxl stamps "modified" on save
                data = re.sub(rb"(<dcterms:modified[^>]*>)[^<]*", rb"\g<1>" + stamp, data)
            dst.writestr(fixed, data)
    path.write_bytes(out.getvalue())


def fmt(value: float, digits: int, decimal: str = ".") -> str:
    text = f"{value:.{digits}f}"
    return text.replace(".", decimal) if decimal != "." else text


# --------------------------------------------------------------------------- 1


def photometric_calibration() -> Path:
    """Line a + b*x; duplicates per standard; one replicate with an air bubble reads high."""
    rng = np.random.default_rng(101)
    conc = np.repeat([0.0, 0.5, 1.0, 2.0, 4.0, 6.0, 8.0, 10.0], 2)
    a, b = 0.0042, 0.0987
    absorb = a + b * conc + rng.normal(0.0, 0.0018, conc.size)
    absorb[11] += 0.072  # second replicate of the 6 mg/L standard: air bubble in the cuvette
    lines = [
        "Photometric calibration - nitrate standards (invented demo data)",
        "Cuvette 10 mm; wavelength 540 nm; each standard measured twice",
        "",
        "Concentration (mg/L),Absorbance",
    ]
    lines += [f"{c:g},{fmt(v, 4)}" for c, v in zip(conc, absorb)]
    path = HERE / "01_photometric_calibration.csv"
    path.write_bytes(("\n".join(lines) + "\n").encode("utf-8"))
    return path


# --------------------------------------------------------------------------- 2


def tracer_decay() -> Path:
    """A*exp(-t/tau) + C with Poisson-like scatter; two detector glitches."""
    rng = np.random.default_rng(202)
    t = np.arange(0.0, 187.5, 7.5)
    amp, tau, background = 12500.0, 42.0, 180.0
    true = amp * np.exp(-t / tau) + background
    counts = rng.poisson(true).astype(float)
    counts[9] = round(counts[9] * 0.46)  # dead-time dropout
    counts[17] = counts[17] + 1630.0  # electronic burst
    u = np.sqrt(np.maximum(counts, 1.0))
    temp = 21.4 + 0.3 * np.sin(t / 40.0) + rng.normal(0.0, 0.05, t.size)
    lines = [
        "Tracer-Abklingkurve Messplatz 2 (erfundene Demo-Daten)",
        "Zählzeit 1 min je Messpunkt;;;",
        "Time (min);Counts (cpm);u(Counts) (cpm);T (°C)",
    ]
    lines += [f"{fmt(ti, 1, ',')};{c:.0f};{fmt(ui, 1, ',')};{fmt(te, 2, ',')}"
              for ti, c, ui, te in zip(t, counts, u, temp)]
    path = HERE / "02_tracer_decay.csv"
    path.write_bytes(("\r\n".join(lines) + "\r\n").encode("cp1252"))
    return path


# --------------------------------------------------------------------------- 3


def enzyme_assay() -> Path:
    """Vmax*S/(Km + S), duplicates; one well with a pipetting slip (too little enzyme)."""
    import openpyxl

    rng = np.random.default_rng(303)
    s = np.repeat([0.05, 0.1, 0.2, 0.4, 0.8, 1.6, 3.2, 6.4, 12.8], 2)
    vmax, km = 42.0, 0.85
    rate = vmax * s / (km + s) * (1.0 + rng.normal(0.0, 0.03, s.size))
    rate[9] *= 0.62  # second well at 0.8 mM: pipetting slip
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "Assay"
    ws.append(["Initial rates, phosphatase assay (invented demo data)"])
    ws.append([])
    ws.append(["[S] (mM)", "Rate (µM/min)"])
    for si, ri in zip(s, rate):
        ws.append([float(si), round(float(ri), 3)])
    notes = wb.create_sheet("Notes")
    for row in [
        ["About this workbook"],
        ["All numbers are invented for demonstrating Ballast; they are not a real assay."],
        ["Each substrate concentration was measured in two wells."],
        ["Well 10 (second well at 0.8 mM) received too little enzyme."],
    ]:
        notes.append(row)
    wb.properties.created = FIXED_DATE
    wb.properties.modified = FIXED_DATE
    wb.properties.creator = "Ballast sample generator"
    path = HERE / "03_enzyme_assay.xlsx"
    wb.save(path)
    pin_zip_dates(path)
    return path


# --------------------------------------------------------------------------- 4


def thermistor() -> Path:
    """NTC thermistor R(T) = R25*exp(B*(1/T - 1/298.15)); one value with two digits swapped."""
    rng = np.random.default_rng(404)
    temp = np.arange(263.15, 358.15, 5.0)
    r25, beta = 10.0, 3950.0  # kOhm, K
    res = r25 * np.exp(beta * (1.0 / temp - 1.0 / 298.15)) * (1.0 + rng.normal(0.0, 0.004, temp.size))
    cells = [fmt(v, 3) for v in res]
    i = 6  # 293.15 K: "12.4xx" typed as "21.4xx"
    cells[i] = cells[i][1] + cells[i][0] + cells[i][2:]
    lines = ["T / K\tR / kOhm"] + [f"{t:.2f}\t{c}" for t, c in zip(temp, cells)]
    path = HERE / "04_thermistor.txt"
    path.write_bytes(b"\xff\xfe" + ("\r\n".join(lines) + "\r\n").encode("utf-16-le"))
    return path


# --------------------------------------------------------------------------- 5


def dose_response() -> Path:
    """Four-parameter logistic (inhibition), triplicate wells; one failed well reads near zero."""
    from odf.opendocument import OpenDocumentSpreadsheet
    from odf.table import Table, TableCell, TableRow
    from odf.text import P

    rng = np.random.default_rng(505)
    dose = np.repeat([0.3, 1.0, 3.0, 10.0, 30.0, 100.0, 300.0, 1000.0], 3)
    bottom, top, hill, ec50 = 4.0, 98.0, 1.15, 36.0
    resp = bottom + (top - bottom) / (1.0 + (dose / ec50) ** hill) + rng.normal(0.0, 2.2, dose.size)
    resp[7] = 3.1  # well C8 (3 nM, replicate 2): no cells seeded
    rows = [["Plate 4, row C: inhibition of reporter signal (invented demo data)"], [],
            ["Dose (nM)", "Response (%)"]]
    rows += [[float(d), round(float(r), 1)] for d, r in zip(dose, resp)]
    doc = OpenDocumentSpreadsheet()
    table = Table(name="Plate")
    for row in rows:
        tr = TableRow()
        for v in row:
            if isinstance(v, float):
                cell = TableCell(valuetype="float", value=repr(v))
                cell.addElement(P(text=repr(v)))
            else:
                cell = TableCell(valuetype="string")
                cell.addElement(P(text=v))
            tr.addElement(cell)
        table.addElement(tr)
    doc.spreadsheet.addElement(table)
    path = HERE / "05_dose_response.ods"
    doc.save(str(path))
    pin_zip_dates(path)
    return path


# --------------------------------------------------------------------------- 6


def raman_peak() -> Path:
    """Gaussian band on a flat baseline with counting noise; one cosmic-ray spike."""
    rng = np.random.default_rng(606)
    wn = np.arange(960.0, 1041.0, 1.0)
    amp, centre, width, base = 1850.0, 1001.5, 4.2, 340.0
    true = amp * np.exp(-((wn - centre) ** 2) / (2 * width**2)) + base
    inten = rng.poisson(true).astype(float)
    inten[57] += 2900.0  # 1017 cm-1: cosmic ray hit the detector
    lines = [
        "# Raman band of a reference film (invented demo data)",
        "# excitation 785 nm, 10 s x 3 accumulations, no spike filter applied",
        "# columns separated by spaces",
        "Wavenumber (cm-1)  Intensity (counts)",
    ]
    lines += [f"{w:8.1f}  {c:8.0f}" for w, c in zip(wn, inten)]
    path = HERE / "06_raman_peak.txt"
    path.write_bytes(("\n".join(lines) + "\n").encode("utf-8"))
    return path


# --------------------------------------------------------------------------- 7


def two_trends() -> Path:
    """Two specimens merged into one file: 70 % follow one line, 30 % a stiffer one."""
    rng = np.random.default_rng(707)
    n_a, n_b = 28, 12
    load_a = np.sort(rng.uniform(5.0, 200.0, n_a))
    load_b = np.sort(rng.uniform(5.0, 200.0, n_b))
    ext_a = 0.012 + 0.00480 * load_a + rng.normal(0.0, 0.006, n_a)
    ext_b = 0.010 + 0.00310 * load_b + rng.normal(0.0, 0.006, n_b)
    load = np.concatenate([load_a, load_b])
    ext = np.concatenate([ext_a, ext_b])
    order = rng.permutation(load.size)  # the logger interleaved the two channels
    lines = ['"Load (N)","Extension (mm)"']
    lines += [f"{load[i]:.1f},{ext[i]:.4f}" for i in order]
    path = HERE / "07_two_trends.csv"
    path.write_bytes(b"\xef\xbb\xbf" + ("\r\n".join(lines) + "\r\n").encode("utf-8"))
    return path


def main() -> None:
    for make in (photometric_calibration, tracer_decay, enzyme_assay, thermistor, dose_response,
                 raman_peak, two_trends):
        print("wrote", make().name)


if __name__ == "__main__":
    main()
