#!/usr/bin/env python3
"""Writes the invented demo deliveries in demo-data/deliveries/.

Everything is invented: the Alder Brook pottery works, its kiln stack, the
transects and the monitoring wells do not exist. The numbers come from
simple models (a log-linear fall of soil lead and zinc with distance from
the stack; slow linear trends in the wells) plus seeded noise, and then the
planted problems listed in demo-data/README.md are written in.

Run from the repository's top folder: python3 demo-data/make_demo.py
(deterministic: the same files every time).
"""
import csv
import math
import os
import random

OUT = os.path.join(os.path.dirname(__file__), "deliveries")
rng = random.Random(20240611)
HEADER = ["record_id", "series", "x", "y", "unit", "sampled_at", "note"]


def write(name, rows):
    with open(os.path.join(OUT, name), "w", newline="") as f:
        w = csv.writer(f, lineterminator="\n")
        w.writerow(HEADER)
        w.writerows(rows)


def transect(prefix, metal, a, b, sd, distances):
    rows = []
    for i, d in enumerate(distances, 1):
        y = math.exp(a - b * d + rng.gauss(0, sd))
        rows.append([f"{prefix}-{metal[:2].upper()}{i:02d}", f"{prefix}/{metal}", d,
                     round(y, 1), "mg/kg", "2024-04-16", ""])
    return rows


def decimal_year(y, m, d):
    import datetime
    start = datetime.date(y, 1, 1)
    days = (datetime.date(y + 1, 1, 1) - start).days
    return round(y + (datetime.date(y, m, d) - start).days / days, 4)


def well(well_id, analyte, unit, level, slope, sd, quarters, digits=2, start=0):
    rows = []
    for k in range(start, start + quarters):
        year, month = 2016 + k // 4, 1 + 3 * (k % 4) + 1
        x = decimal_year(year, month, 15)
        y = level + slope * (x - 2016) + rng.gauss(0, sd)
        rows.append([f"{well_id}-{analyte[:3].upper()}-{year}Q{k % 4 + 1}",
                     f"{well_id}/{analyte}", x, round(max(y, 0.01), digits), unit,
                     f"{year}-{month:02d}-15", ""])
    return rows


def main():
    os.makedirs(OUT, exist_ok=True)
    for f in os.listdir(OUT):
        os.remove(os.path.join(OUT, f))
    dist = [15, 25, 40, 55, 70, 90, 110, 135, 160, 190, 220, 260, 300, 350, 400, 460, 520, 600]
    # 1. The spring soil survey: three transects from the kiln stack.
    rows = []
    rows += transect("ABN-transect", "lead", 6.9, 0.0052, 0.18, dist)
    rows += transect("ABE-transect", "lead", 6.6, 0.0047, 0.18, dist)
    rows += transect("ABE-transect", "zinc", 5.2, 0.0031, 0.15, dist)
    rows += transect("ABS-transect", "lead", 6.4, 0.0058, 0.18, dist)
    # Genuine extreme, correct: the station beside the old kiln wall is
    # very high, but on the transect's own steep line.
    rows[0][3] = round(rows[0][3] * 1.35, 1)
    rows[0][6] = "beside the old kiln wall; field team confirmed"
    write("2024-04-20_spring-soil-survey.csv", rows)

    # 2. The wells' history, 2016 to 2023, quarterly.
    rows = []
    rows += well("AB-MW1", "nitrate", "mg/L", 9.8, -0.25, 0.35, 32)
    rows += well("AB-MW2", "nitrate", "mg/L", 6.1, -0.12, 0.30, 32)
    rows += well("AB-MW3", "trichloroethene", "µg/L", 14.0, 0.9, 1.1, 32, 1)
    rows += well("AB-MW4", "trichloroethene", "µg/L", 3.0, 0.05, 0.6, 32, 1)
    write("2024-05-02_wells-2016-2023.csv", rows)

    # 3. Lab batch for 2024 Q1. Planted: a decimal slip (AB-MW2 nitrate
    # 5.2 typed as 52).
    rows = []
    rows += well("AB-MW1", "nitrate", "mg/L", 9.8, -0.25, 0.35, 1, start=32)
    q1 = well("AB-MW2", "nitrate", "mg/L", 6.1, -0.12, 0.30, 1, start=32)
    q1[0][3] = round(q1[0][3] * 10, 1)
    rows += q1
    rows += well("AB-MW3", "trichloroethene", "µg/L", 14.0, 0.9, 1.1, 1, 1, start=32)
    rows += well("AB-MW4", "trichloroethene", "µg/L", 3.0, 0.05, 0.6, 1, 1, start=32)
    write("2024-05-10_lab-batch-2024Q1.csv", rows)

    # 4. Lab batch for 2024 Q2. Planted: a unit mix-up (AB-MW3 TCE entered
    # in mg/L as if it were µg/L: 0.0221 where 22.1 was meant).
    rows = []
    rows += well("AB-MW1", "nitrate", "mg/L", 9.8, -0.25, 0.35, 1, start=33)
    rows += well("AB-MW2", "nitrate", "mg/L", 6.1, -0.12, 0.30, 1, start=33)
    q2 = well("AB-MW3", "trichloroethene", "µg/L", 14.0, 0.9, 1.1, 1, 1, start=33)
    q2[0][3] = round(q2[0][3] / 1000, 4)
    rows += q2
    rows += well("AB-MW4", "trichloroethene", "µg/L", 3.0, 0.05, 0.6, 1, 1, start=33)
    write("2024-08-06_lab-batch-2024Q2.csv", rows)

    # 5. Autumn infill of the transects. Planted: a sample taken far beyond
    # the surveyed 15-600 m (the wrong fence post, 1,850 m out), a zinc
    # value filed under lead, and a non-detect.
    rows = []
    extra = [45, 120, 240, 480]
    rows += transect("ABN-transect", "lead", 6.9, 0.0052, 0.18, extra)
    rows += transect("ABE-transect", "lead", 6.6, 0.0047, 0.18, extra)
    rows += transect("ABS-transect", "lead", 6.4, 0.0058, 0.18, extra + [560])
    for r, tag in zip(rows, range(100)):
        r[0] = r[0] + "b"
        r[5] = "2024-09-24"
    far = ["ABN-transect-PB99", "ABN-transect/lead", 1850, round(math.exp(6.9 - 0.0052 * 600) * 1.1, 1),
           "mg/kg", "2024-09-24", "post N-18? field sheet unclear"]
    rows.append(far)
    # Zinc at 260 m on the east transect is about 150 mg/kg; lead there
    # about 215. The zinc reading was filed under lead.
    zinc_like = round(math.exp(5.2 - 0.0031 * 190), 1)
    rows.append(["ABE-transect-PB30", "ABE-transect/lead", 190, zinc_like, "mg/kg", "2024-09-24", ""])
    rows.append(["ABS-transect-PB40", "ABS-transect/lead", 600, "<5", "mg/kg", "2024-09-24",
                 "below the reporting limit"])
    write("2024-10-01_soil-infill.csv", rows)

    # 6. Lab batch for 2024 Q3: clean; the wells carry on.
    rows = []
    rows += well("AB-MW1", "nitrate", "mg/L", 9.8, -0.25, 0.35, 1, start=34)
    rows += well("AB-MW2", "nitrate", "mg/L", 6.1, -0.12, 0.30, 1, start=34)
    rows += well("AB-MW3", "trichloroethene", "µg/L", 14.0, 0.9, 1.1, 1, 1, start=34)
    rows += well("AB-MW4", "trichloroethene", "µg/L", 3.0, 0.05, 0.6, 1, 1, start=34)
    write("2024-11-04_lab-batch-2024Q3.csv", rows)


if __name__ == "__main__":
    main()
