#!/usr/bin/python3
"""Writes slopewarden's hostile-input corpus and its manifest.

    /usr/bin/python3 tests/hostile/make_corpus.py OUT [--inbox DIR]
        [--tiny N] [--big-mb M] [--race N] [--swap-mb M]

Debian's python3, standard library only. The output is the same on every
run (a fixed seed, no clock): only the links that point at absolute paths
depend on OUT and --inbox.

OUT/drop/     the cases dropped into the inbox at once, one case per entry
              (files, a FIFO, symlinks, a subfolder, temp and hidden names)
OUT/tiny/     N tiny valid files (default 10,000), dropped with drop/
OUT/late/     slow-writer.csv: the harness appends it to the inbox in small
              pieces (cut mid-line) over a few seconds
OUT/race/     vanish-K.csv: each dropped, then deleted a little later
OUT/swap/     s1..s4: dropped together; s3 and s4 are then replaced by
              symlinks to files outside the inbox while the daemon works
OUT/outside/  files and a folder outside the inbox that symlinks point at
OUT/manifest.json

Symlinks are written with the targets they must have once they sit in the
inbox given by --inbox (default: OUT/drop itself); move the entries of
OUT/drop into that folder with rename, not copy.

Each manifest case says what must happen:
  quarantined  the whole file is set aside: a source_files row with outcome
               'quarantined' whose detail contains `reason`, the file in
               quarantine/YYYY/MM/ beside NAME.reason.txt, nothing stored
  ingested     a source_files row with `records` new records and `set_aside`
               refused rows, the file (or, for a link, a copy of its
               target) in archive/YYYY/MM/
  ignored      left where it is, untouched; its content never stored
  whole-or-none (race group) either `records` records or none, never part
  never-outside (swap group) the outside file the symlink leads to is never
               read: not stored, not copied to the archive or quarantine
Names are given as text and, exactly, as hex bytes (`name_hex`); contents by
SHA-256, which is what the store keys files by.
"""

import argparse
import hashlib
import json
import os
import random
import shutil
import sys

SEED = 20261202
HEADER = "record_id,series,x,y,unit,sampled_at,note\n"


class Corpus:
    def __init__(self, out, inbox):
        self.out = out
        self.inbox = inbox
        self.cases = []

    def path(self, group, name):
        return os.path.join(self.out, group, os.fsdecode(name))

    def add(self, group, name, data, expect, **fields):
        """Writes one file and records its case."""
        if isinstance(data, str):
            data = data.encode("utf-8")
        if isinstance(name, str):
            name = name.encode("utf-8", "surrogateescape")
        with open(self.path(group, name), "wb") as f:
            f.write(data)
        return self.note(group, name, expect, sha256=sha256(data), size=len(data), **fields)

    def note(self, group, name, expect, **fields):
        """Records a case without writing a file."""
        if isinstance(name, str):
            name = name.encode("utf-8", "surrogateescape")
        case = {
            "group": group,
            "name": name.decode("utf-8", "replace"),
            "name_hex": name.hex(),
            "expect": expect,
        }
        case.update(fields)
        self.cases.append(case)
        return case

    def link(self, name, target, expect, **fields):
        """A symlink in drop/, pointing where it must once in the inbox."""
        os.symlink(target, self.path("drop", name))
        return self.note("drop", name, expect, link_target=target, **fields)


def sha256(data):
    return hashlib.sha256(data).hexdigest()


def rows(prefix, series, n, start=2001.0, step=0.25, base=10.0, slope=0.4, note=""):
    """n clean records on a gentle line with small deterministic wiggles."""
    out = []
    for i in range(n):
        x = start + step * i
        y = base + slope * (x - start) + (0.05 if i % 2 else -0.04) + 0.01 * (i % 3)
        out.append(f"{prefix}-{i + 1:03d},{series},{x:.2f},{y:.3f},mg/L,,{note}\n")
    return out


def csv_field(text):
    return '"' + text.replace('"', '""') + '"'


def injected_series_file(prefix, series_cell, id_of_last):
    """12 clean records then one ten times too large: an outlier finding
    (and a trend finding), so messages about the series are written."""
    body = rows(prefix, series_cell, 12)
    y = 10.0 * (10.0 + 0.4 * 3.0)
    body.append(f"{id_of_last},{series_cell},2004.00,{y:.3f},mg/L,,\n")
    return HEADER + "".join(body)


def make_drop(c, r):
    d = "drop"
    # --- Not text -----------------------------------------------------------
    png = b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR" + bytes(r.randrange(256) for _ in range(4096))
    c.add(d, "h01-scan-as-image.csv", png, "quarantined", reason="not UTF-8 text",
          case="binary: a PNG saved with a .csv name")
    zipped = b"PK\x03\x04\x14\x00\x06\x00" + bytes(r.randrange(256) for _ in range(8192))
    c.add(d, "h02-workbook.xlsx", zipped, "quarantined", reason="not UTF-8 text",
          case="binary: a spreadsheet workbook (zip)")
    noise = bytes(r.randrange(256) for _ in range(65536)) + b"\x00"
    c.add(d, "h03-random-bytes.csv", noise, "quarantined", reason="not UTF-8 text",
          case="binary: 64 KiB of random bytes")
    utf16 = "\ufeff" + HEADER + "U1,Fernhollow/MW-2/chloride,2001,1.5,mg/L,,\n"
    c.add(d, "h04-utf16.csv", utf16.encode("utf-16-le"), "quarantined", reason="UTF-16",
          case="text in UTF-16 with a byte-order mark")
    latin1 = (HEADER + "L1,Fernhollow/MW-2/chloride,2001,1.5,\xb5g/L,,M\xfchle\n").encode("latin-1")
    c.add(d, "h05-latin1.csv", latin1, "quarantined", reason="invalid UTF-8",
          case="invalid UTF-8: Latin-1 text")
    good = "".join(rows("TAIL", "Quillmere/T-4/lead", 30000, start=1990.0, step=0.001))
    tail_bad = (HEADER + good).encode() + b"TAIL-x,Quillmere/T-4/lead,2021,1.0,mg/L,,caf\xe9\n"
    c.add(d, "h06-invalid-utf8-on-the-last-line.csv", tail_bad, "quarantined",
          reason="invalid UTF-8", case="1.6 MB of good rows, one Latin-1 byte on the last line: nothing of it stored")
    mid = (HEADER + "".join(rows("NUL", "Quillmere/T-5/lead", 200))).encode()
    mid = mid[: len(mid) // 2] + b"\x00" + mid[len(mid) // 2:]
    c.add(d, "h07-nul-in-the-middle.csv", mid, "quarantined", reason="NUL byte",
          case="a NUL byte in the middle of good rows")
    c.add(d, "h08-empty.csv", b"", "quarantined", reason="no header", case="an empty file")

    # --- Size and shape -----------------------------------------------------
    c.add(d, "h09-one-10mb-line.csv", b"x" * (10 * 1024 * 1024), "quarantined",
          reason="required column(s)", case="a 10 MB single line (no line break)")
    note = "".join(r.choice("abcdefghij klmnopqrstuvwxyz") for _ in range(10 * 1024 * 1024))
    c.add(d, "h10-one-10mb-row.csv",
          HEADER + f"LONG-1,Larchgate/MW-6/iron,2001.5,1.25,mg/L,,{note}\n", "ingested",
          records=1, set_aside=0, case="a 10 MB single row (its note)")
    names = ["record_id", "series", "x", "y"] + [f"extra_{i}" for i in range(4, 100_000)]
    wide = [",".join(names)]
    for k in range(3):
        wide.append(",".join([f"WIDE-{k + 1}", "Larchgate/MW-5/iron", f"{2001 + k}", "1.5"]
                             + [str(i % 10) for i in range(4, 100_000)]))
    c.add(d, "h11-100000-columns.csv", "\n".join(wide) + "\n", "ingested", records=3, set_aside=0,
          case="100,000 columns, the required four first, 3 rows")
    c.add(d, "h12-100000-columns-none-required.csv",
          ",".join(f"col{i}" for i in range(100_000)) + "\n" + ",".join(["1"] * 100_000) + "\n",
          "quarantined", reason="required column(s)", case="100,000 columns, none of them required ones")
    blank = HEADER + ",,,,,,\n" * 500_000 + "\n" * 500_000 + "".join(rows("GAP", "Larchgate/MW-7/iron", 2))
    c.add(d, "h13-million-blank-lines.csv", blank, "ingested", records=2, set_aside=0,
          case="a million blank and empty-cell lines, then 2 records")

    # --- CSV structure --------------------------------------------------------
    open_quote = HEADER + "".join(rows("OPEN", "Larchgate/MW-8/iron", 5)) + 'OPEN-9,Larchgate/MW-8/iron,2003,"1.5\n'
    c.add(d, "h14-unclosed-quote.csv", open_quote, "quarantined", reason="never closed",
          case="a quote opened on the last row and never closed (a cut transfer)")
    swallow = (HEADER + "".join(rows("SWL", "Larchgate/MW-9/iron", 3))
               + 'SWL-004,Larchgate/MW-9/iron,2002.00,1.5,mg/L,,"stray quote\n'
               + "SWL-005,Larchgate/MW-9/iron,2002.25,1.6,mg/L,,\n"
               + 'SWL-006,Larchgate/MW-9/iron,2002.50,1.7,mg/L,,closed here"\n'
               + "".join(rows("SWM", "Larchgate/MW-9/iron", 2, start=2003.0)))
    c.add(d, "h15-stray-quote.csv", swallow, "ingested", records=5, set_aside=1,
          case="a stray quote closed two lines down swallows them: one row refused, the rest kept")
    c.add(d, "h16-duplicate-column.csv",
          "record_id,series,x,y,y\nDUP-1,Larchgate/MW-1/iron,2001,1,2\n", "quarantined",
          reason="appears twice", case="a required column named twice")
    bom = ("\ufeff" + HEADER + "".join(rows("BOM", "Larchgate/MW-2/iron", 4))).replace("\n", "\r\n")
    c.add(d, "h17-bom-and-crlf.csv", bom, "ingested", records=4, set_aside=0,
          case="a UTF-8 byte-order mark and CRLF line ends")

    # --- Formula cells --------------------------------------------------------
    formula = HEADER + "".join([
        "FRM-01,Fernhollow/MW-3/chloride,2001.00,12.5,mg/L,,=cmd|' /C calc'!A0\n",
        "FRM-02,Fernhollow/MW-3/chloride,2001.25,=cmd|' /C calc'!A0,mg/L,,\n",
        "FRM-03,Fernhollow/MW-3/chloride,2001.50,+41,mg/L,,\n",
        "FRM-04,Fernhollow/MW-3/chloride,2001.75,-cmd|' /C calc'!A0,mg/L,,\n",
        "FRM-05,Fernhollow/MW-3/chloride,2002.00,@SUM(A1:A9),mg/L,,\n",
        "FRM-06,Fernhollow/MW-3/chloride,=1+2,12.9,mg/L,,\n",
        "FRM-07,Fernhollow/MW-3/chloride,2002.50,-2.5,mg/L,,\n",
        "FRM-08,Fernhollow/MW-3/chloride,2002.75,#DIV/0!,mg/L,,\n",
        '=HYPERLINK("http://example.net/x"),Fernhollow/MW-3/chloride,2003.00,13.1,mg/L,,@SUM(A1)\n',
        '+FRM-10,"=HYPERLINK(""http://example.net/y"",""open"")",2003.25,13.2,mg/L,,-2+3\n',
        "FRM-11,Fernhollow/MW-3/chloride,2003.50,13.4,mg/L,,+ok\n",
    ])
    c.add(d, "h18-formula-cells.csv", formula, "ingested", records=4, set_aside=7,
          case="formula cells (=, +, -, @) in values are refused, as text they are kept")

    # --- Header injection in series names and record ids -----------------------
    c.add(d, "h19-crlf-in-series.csv",
          injected_series_file("INJA", csv_field("INJ-A Fernhollow/MW-2\r\nBcc: intruder@example.net\r\nX-Injected: yes"),
                               csv_field("INJA-013\r\nBcc: intruder@example.net")),
          "ingested", records=13, set_aside=0, mail_token="INJ-A",
          case="CR/LF and Bcc:/X-Injected: lines in a series name and a record id")
    c.add(d, "h20-lf-in-series.csv",
          injected_series_file("INJB", csv_field("INJ-B Fernhollow/MW-4\nSubject: forged\nBcc: intruder@example.net"), "INJB-013"),
          "ingested", records=13, set_aside=0, mail_token="INJ-B",
          case="bare LF and Subject:/Bcc: lines in a series name")
    c.add(d, "h21-cr-in-series.csv",
          injected_series_file("INJC", csv_field("INJ-C Fernhollow/MW-6\rBcc: intruder@example.net"), "INJC-013"),
          "ingested", records=13, set_aside=0, mail_token="INJ-C",
          case="a bare CR and a Bcc: line in a series name")
    c.add(d, "h22-script-series.csv",
          injected_series_file("INJD", csv_field("INJ-D <script>alert('sw')</script> Fernhollow/MW-7"), "INJD-013"),
          "ingested", records=13, set_aside=0, mail_token="INJ-D", html_forbidden="<script>",
          case="<script> in a series name")
    c.add(d, "h23-encoded-word-series.csv",
          injected_series_file("INJE", "INJ-E =?utf-8?q?=0D=0ABcc:_intruder@example.net?= Fernhollow/MW-8", "INJE-013"),
          "ingested", records=13, set_aside=0, mail_token="INJ-E",
          case="an RFC 2047 encoded CR/LF in a series name")
    c.add(d, "h24-unicode-separators-series.csv",
          injected_series_file("INJF", "INJ-F Fernhollow/MW-9\u2028Bcc: intruder@example.net\u0085X-Injected: yes", "INJF-013"),
          "ingested", records=13, set_aside=0, mail_token="INJ-F",
          case="U+2028 and U+0085 (NEL) line separators in a series name")

    # --- File names with shell metacharacters -----------------------------------
    shell_names = [
        "$(touch SW_PWNED_1).csv",
        "`touch SW_PWNED_2`.csv",
        "a;touch SW_PWNED_3;b.csv",
        "it's \"quoted\" & <angled> | piped.csv",
        "  spaces  around  .csv",
        "-rf --help.csv",
        "*?[glob]{a,b}.csv",
        "back\\slash\ttab.csv",
        "Brunnen Süd – Messung №3 井戸.csv",
        b"caf\xe9 latin-1 name.csv",
    ]
    for k, name in enumerate(shell_names, 1):
        body = HEADER + "".join(rows(f"SHN{k:02d}", f"Hollin/MW-{k}/zinc", 2))
        c.add(d, name, body, "ingested", records=2, set_aside=0,
              case="shell metacharacters, quotes, spaces or non-ASCII in the file name")
    c.add(d, "name with\nnewline Bcc: intruder@example.net.csv", b"\x00\x01binary\xff",
          "quarantined", reason="not UTF-8 text", mail_token="newline Bcc",
          case="a line break and Bcc: in a file name (its quarantine message names it)")

    # --- Names that are never taken -----------------------------------------------
    ignored = [
        (".hidden.csv", "a hidden file"),
        ("upload.csv.part", "an upload in progress (*.part)"),
        ("UPLOAD2.CSV.PART", "an upload in progress, upper case"),
        ("winscp.csv.filepart", "a WinSCP upload in progress"),
        ("export.tmp", "a temporary file"),
        ("~$locked.csv", "an office lock file"),
        ("old.csv.reason.txt", "a name ending like our own quarantine notes"),
    ]
    for k, (name, why) in enumerate(ignored, 1):
        body = HEADER + "".join(rows(f"IGN{k:02d}", "Hollin/MW-90/zinc", 2))
        c.add(d, name, body, "ignored", case=why)
    os.mkfifo(c.path(d, "pipe.csv"))
    c.note(d, "pipe.csv", "ignored", case="a FIFO (reading it would block)")
    os.mkdir(c.path(d, "subfolder"))
    sub = (HEADER + "".join(rows("SUB", "Hollin/MW-91/zinc", 2))).encode()
    with open(c.path(d, "subfolder/inner.csv"), "wb") as f:
        f.write(sub)
    c.note(d, "subfolder", "ignored", sha256=sha256(sub),
           case="a subfolder (subfolders are off)")

    # --- Symlinks -------------------------------------------------------------------
    outside = os.path.join(c.out, "outside")
    secret = HEADER + "".join(rows("OUT", "Hollin/MW-99/zinc", 3))
    secret_path = os.path.join(outside, "secret-outside.csv")
    with open(secret_path, "w") as f:
        f.write(secret)
    os.mkdir(os.path.join(outside, "folder"))
    with open(os.path.join(outside, "folder", "deep.csv"), "w") as f:
        f.write(secret.replace("OUT-", "DEEP-"))
    secret_sha = sha256(secret.encode())
    c.link("link-outside-absolute.csv", os.path.abspath(secret_path), "ignored",
           sha256=secret_sha, outside_target=True, case="a symlink to a file outside the inbox (absolute)")
    rel = os.path.relpath(os.path.abspath(secret_path), os.path.abspath(c.inbox))
    c.link("link-outside-relative.csv", rel, "ignored", sha256=secret_sha, outside_target=True,
           case="a symlink climbing out of the inbox (../)")
    c.link("link-etc-passwd.csv", "/etc/passwd", "ignored", outside_target=True,
           case="a symlink to /etc/passwd")
    c.link("link-outside-folder", os.path.abspath(os.path.join(outside, "folder")), "ignored",
           outside_target=True, case="a symlink to a folder outside")
    c.link("link-dangling.csv", "no-such-file.csv", "ignored", case="a dangling symlink")
    os.mkdir(c.path(d, ".hop"))
    os.symlink(os.path.abspath(secret_path), c.path(d, ".hop/out.csv"))
    c.link("link-chain-outside.csv", ".hop/out.csv", "ignored", sha256=secret_sha,
           outside_target=True, case="a symlink to a symlink inside that leads outside")
    c.note(d, ".hop", "ignored", case="a hidden folder holding a symlink that leads outside")
    os.mkdir(c.path(d, ".vault"))
    inner = HEADER + "".join(rows("VLT", "Hollin/MW-92/zinc", 3))
    with open(c.path(d, ".vault/inner.csv"), "w") as f:
        f.write(inner)
    c.link("link-inside.csv", ".vault/inner.csv", "ingested", records=3, set_aside=0,
           sha256=sha256(inner.encode()),
           case="a symlink to a hidden file inside the inbox: followed, archived as a copy")
    c.note(d, ".vault", "ignored", case="a hidden folder (its file is ingested through link-inside.csv)")


def make_big(c, r, mb):
    """A dense, valid CSV of `mb` MiB: about 16,600 records per MiB."""
    limit = mb * 1024 * 1024
    h = hashlib.sha256()
    n = size = 0
    with open(c.path("drop", "h30-dense-%dmb.csv" % mb), "wb") as f:
        chunk = [HEADER]
        size = len(HEADER)
        while size < limit:
            line = f"BIG-{n:08d},Ashcombe/BH-{n % 50:02d}/sulfate,{1990 + n / 100000:.5f},{40 + (n * 7919 % 1000) / 1000:.3f},mg/L,,\n"
            chunk.append(line)
            size += len(line)
            n += 1
            if len(chunk) >= 20000:
                data = "".join(chunk).encode()
                f.write(data)
                h.update(data)
                chunk = []
        data = "".join(chunk).encode()
        f.write(data)
        h.update(data)
    c.note("drop", "h30-dense-%dmb.csv" % mb, "ingested", records=n, set_aside=0,
           sha256=h.hexdigest(), size=size, case="a %d MB valid file (%d records)" % (mb, n))


def make_tiny(c, n):
    files = []
    for k in range(n):
        x = 2000 + (k // 100) * 0.05
        y = 5.0 + 0.02 * (k // 100) + ((k * 37) % 11 - 5) * 0.004
        data = f"record_id,series,x,y\nTNY-{k:05d},Tinyfield/W-{k % 100:03d}/sulfate,{x:.2f},{y:.4f}\n".encode()
        name = f"tiny-{k:05d}.csv"
        with open(c.path("tiny", name), "wb") as f:
            f.write(data)
        files.append([name, sha256(data)])
    c.cases.append({"group": "tiny", "name": "tiny-*.csv", "expect": "ingested-each",
                    "records": 1, "set_aside": 0, "count": n, "files": files,
                    "case": "%d tiny files dropped at once" % n})


def make_late(c):
    body = HEADER + "".join(rows("SLOW", "Fernhollow/MW-5/chloride", 40))
    c.add("late", "slow-writer.csv", body, "ingested", records=40, set_aside=0,
          case="a file still being written: appended in pieces cut mid-line for a few seconds")


def make_race(c, n):
    for k in range(1, n + 1):
        body = HEADER + "".join(rows(f"VAN{k}", f"Ashcombe/BH-9{k}/sulfate", 60000, start=1980.0, step=0.0005))
        c.add("race", f"vanish-{k}.csv", body, "whole-or-none", records=60000,
              case="a large file deleted shortly after it is dropped (round %d)" % k)


def make_swap(c, mb):
    """Files swapped for symlinks to outside files after the daemon listed
    them: s1 is large, so that the daemon reads s3 before the swap and moves
    it after, and reads s4 only after the swap."""
    body = [HEADER]
    n = 0
    size = len(HEADER)
    while size < mb * 1024 * 1024:
        line = f"SWA-{n:07d},Ashcombe/BH-{n % 20:02d}/nitrate,{1990 + n / 20000:.5f},{20 + (n * 7919 % 1000) / 1000:.3f},mg/L,,\n"
        body.append(line)
        size += len(line)
        n += 1
    c.add("swap", "s1-large.csv", "".join(body), "ingested", records=n, set_aside=0,
          case="a large file ahead of the swapped ones")
    c.add("swap", "s2-small.csv", HEADER + "".join(rows("SWB", "Hollin/MW-20/zinc", 2)), "ingested",
          records=2, set_aside=0, case="a small file between")
    for name, prefix, target, secret_prefix, when in [
        ("s3-swapped-before-move.csv", "SWC", "swap-target-move.csv", "TGM", "after it is read, before it is moved"),
        ("s4-swapped-before-read.csv", "SWD", "swap-target-read.csv", "TGR", "after it is listed, before it is read"),
    ]:
        secret = HEADER + "".join(rows(secret_prefix, "Private/MW-7/arsenic", 2, note="not for the inbox"))
        with open(os.path.join(c.out, "outside", target), "w") as f:
            f.write(secret)
        c.add("swap", name, HEADER + "".join(rows(prefix, "Hollin/MW-21/zinc", 1)), "never-outside",
              swap_target=target, target_sha256=sha256(secret.encode()), target_prefix=secret_prefix,
              case=f"replaced by a symlink to a file outside the inbox {when}")


def main():
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("out", help="folder to write (must not exist, or be empty)")
    p.add_argument("--inbox", help="the inbox the drop/ entries will be renamed into (for relative links)")
    p.add_argument("--tiny", type=int, default=10_000, help="tiny files (default 10000)")
    p.add_argument("--big-mb", type=int, default=100, help="size of the dense valid file, 0 for none (default 100)")
    p.add_argument("--swap-mb", type=int, default=20, help="size of the file ahead of the swapped ones, 0 for no swap cases (default 20)")
    p.add_argument("--race", type=int, default=8, help="files deleted after the drop (default 8)")
    a = p.parse_args()
    if os.path.exists(a.out) and os.listdir(a.out):
        sys.exit(f"make_corpus.py: {a.out} is not empty")
    for sub in ["drop", "tiny", "late", "race", "swap", "outside"]:
        os.makedirs(os.path.join(a.out, sub), exist_ok=True)
    c = Corpus(a.out, a.inbox or os.path.join(a.out, "drop"))
    r = random.Random(SEED)
    make_drop(c, r)
    if a.big_mb > 0:
        make_big(c, r, a.big_mb)
    make_tiny(c, a.tiny)
    make_late(c)
    make_race(c, a.race)
    if a.swap_mb > 0:
        make_swap(c, a.swap_mb)
    with open(os.path.join(a.out, "manifest.json"), "w") as f:
        json.dump({"seed": SEED, "cases": c.cases}, f, indent=1, ensure_ascii=False)
        f.write("\n")
    print(f"make_corpus.py: {len(c.cases)} cases in {a.out}", file=sys.stderr)


if __name__ == "__main__":
    main()
