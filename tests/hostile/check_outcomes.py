#!/usr/bin/python3
"""Checks a hostile-corpus run against its manifest (used by tests/hostile.sh).

    /usr/bin/python3 tests/hostile/check_outcomes.py SITE CORPUS [--races FILE]

SITE holds the daemon's folders (inbox/, data/slopewarden.sqlite3,
data/archive, data/quarantine, data/outbox); CORPUS is what make_corpus.py
wrote. --races names a JSON list of the race rounds the harness ran
(name, delay). Prints one line per case and what was wrong, and exits 1 if
anything was. Debian's python3, standard library only; the store is opened
read-only.
"""

import argparse
import email
import email.policy
import glob
import hashlib
import json
import os
import re
import sqlite3
import sys

# Headers our messages may carry; any other (Bcc, X-Injected...) is injected.
ALLOWED_HEADERS = {
    "from", "to", "subject", "date", "message-id", "auto-submitted", "mime-version",
    "content-type", "content-transfer-encoding", "content-id", "content-disposition",
    "in-reply-to", "references",
}
# A quarantine note or stored reason longer than this echoes the input back.
MAX_REASON_BYTES = 64 * 1024
# Record ids of content that must never be stored.
FORBIDDEN_PREFIXES = ["IGN", "OUT-", "DEEP-", "TGM-", "TGR-", "SUB-", "TAIL-", "NUL-", "OPEN-", "DUP-", "U1", "L1"]


def sha_file(path):
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def month_files(root):
    """name (bytes) -> [paths] for files in root/YYYY/MM/."""
    out = {}
    pattern = re.compile(rb"^\d{4}$")
    month = re.compile(rb"^\d{2}$")
    broot = os.fsencode(root)
    if not os.path.isdir(broot):
        return out
    for y in os.listdir(broot):
        if not pattern.match(y):
            continue
        for m in os.listdir(os.path.join(broot, y)):
            if not month.match(m):
                continue
            folder = os.path.join(broot, y, m)
            for name in os.listdir(folder):
                out.setdefault(name, []).append(os.path.join(folder, name))
    return out


class Checker:
    def __init__(self, site, corpus, races):
        self.site = site
        self.corpus = corpus
        self.races = races
        self.db = sqlite3.connect(f"file:{site}/data/slopewarden.sqlite3?mode=ro", uri=True)
        self.files = {}
        for row in self.db.execute(
            "SELECT id, name, sha256, outcome, records_new, records_bad, detail FROM source_files"
        ):
            self.files[row[2]] = row
        # Rows per file, counted once (records has no index on file_id).
        self.record_counts = dict(self.db.execute(
            "SELECT file_id, COUNT(*) FROM records GROUP BY file_id"))
        self.refused_counts = dict(self.db.execute(
            "SELECT file_id, COUNT(*) FROM quarantined_rows GROUP BY file_id"))
        self.archive = month_files(os.path.join(site, "data", "archive"))
        self.quarantine = month_files(os.path.join(site, "data", "quarantine"))
        self.inbox = os.fsencode(os.path.join(site, "inbox"))
        self.rows = []
        self.failures = []
        self.expected_files = set()

    def count(self, sql, *args):
        return self.db.execute(sql, args).fetchone()[0]

    def report(self, case, observed, problems):
        name = case["name"]
        shown = name if len(name) <= 44 else name[:43] + "…"
        self.rows.append((case["group"], repr(shown)[1:-1], case["expect"], observed, not problems))
        for p in problems:
            self.failures.append(f"{case['group']}/{repr(name)}: {p}")

    # --- one case -------------------------------------------------------------
    def stored(self, case, sha, records, set_aside):
        """Problems with a file that must be stored with these counts."""
        row = self.files.get(sha)
        if row is None:
            return None, ["not in source_files (never ingested)"]
        self.expected_files.add(sha)
        fid, _, _, outcome, new, bad, detail = row
        p = []
        want = "partial" if set_aside else "ingested"
        if outcome != want:
            p.append(f"outcome {outcome!r}, expected {want!r} ({detail})")
        if new != records:
            p.append(f"records_new {new}, expected {records}")
        if bad != set_aside:
            p.append(f"records_bad {bad}, expected {set_aside}")
        n = self.record_counts.get(fid, 0)
        if n != records:
            p.append(f"{n} rows in records, expected {records}")
        q = self.refused_counts.get(fid, 0)
        if q != set_aside:
            p.append(f"{q} rows in quarantined_rows, expected {set_aside}")
        return row, p

    def ingested(self, case):
        name = bytes.fromhex(case["name_hex"])
        _, p = self.stored(case, case["sha256"], case["records"], case["set_aside"])
        archived = self.archive.get(name, [])
        if len(archived) != 1:
            p.append(f"{len(archived)} copies in the archive, expected 1")
        else:
            a = archived[0]
            if os.path.islink(a):
                p.append("archived as a symlink, not as data")
            elif sha_file(a) != case["sha256"]:
                p.append("the archived copy differs from what was dropped")
        if os.path.lexists(os.path.join(self.inbox, name)):
            p.append("still in the inbox")
        obs = f"ingested {case['records']}/{case['set_aside']}" if not p else "WRONG"
        self.report(case, obs, p)

    def quarantined(self, case):
        name = bytes.fromhex(case["name_hex"])
        p = []
        row = self.files.get(case["sha256"])
        if row is None:
            p.append("no source_files row")
        else:
            self.expected_files.add(case["sha256"])
            fid, _, _, outcome, _, _, detail = row
            if outcome != "quarantined":
                p.append(f"outcome {outcome!r}, expected 'quarantined'")
            if case["reason"] not in (detail or ""):
                p.append(f"stored reason lacks {case['reason']!r}")
            if len((detail or "").encode()) > MAX_REASON_BYTES:
                p.append(f"stored reason is {len(detail.encode())} bytes (over {MAX_REASON_BYTES}): it echoes the input")
            n = self.record_counts.get(fid, 0)
            if n:
                p.append(f"{n} records stored from a quarantined file")
        placed = self.quarantine.get(name, [])
        if len(placed) != 1:
            p.append(f"{len(placed)} copies in quarantine/YYYY/MM/, expected 1")
        else:
            q = placed[0]
            if sha_file(q) != case["sha256"]:
                p.append("the quarantined copy differs from what was dropped")
            reason = q + b".reason.txt"
            if not os.path.isfile(reason):
                p.append("no .reason.txt beside it")
            else:
                size = os.path.getsize(reason)
                with open(reason, "rb") as f:
                    text = f.read().decode("utf-8", "replace")
                if case["reason"] not in text or "What to do" not in text:
                    p.append(f".reason.txt lacks {case['reason']!r} or what to do")
                if size > MAX_REASON_BYTES:
                    p.append(f".reason.txt is {size} bytes (over {MAX_REASON_BYTES}): it echoes the input")
        if os.path.lexists(os.path.join(self.inbox, name)):
            p.append("still in the inbox")
        self.report(case, "quarantined" if not p else "WRONG", p)

    def ignored(self, case):
        name = bytes.fromhex(case["name_hex"])
        path = os.path.join(self.inbox, name)
        p = []
        if not os.path.lexists(path):
            p.append("gone from the inbox")
        elif "link_target" in case:
            if not os.path.islink(path) or os.readlink(path) != os.fsencode(case["link_target"]):
                p.append("the symlink was changed")
        elif os.path.isfile(path) and not os.path.islink(path) and "sha256" in case:
            if sha_file(path) != case["sha256"]:
                p.append("its content was changed")
        if "sha256" in case and case["sha256"] in self.files:
            p.append("its content was stored")
        if name in self.archive or name in self.quarantine:
            p.append("it was moved to the archive or quarantine")
        if case.get("outside_target") and "sha256" in case:
            target = os.path.join(self.corpus, "outside", "secret-outside.csv")
            if not os.path.isfile(target) or sha_file(target) != case["sha256"]:
                p.append("the file outside the inbox was moved or changed")
        self.report(case, "ignored" if not p else "WRONG", p)

    def tiny(self, case):
        p = []
        bad = 0
        for name, sha in case["files"]:
            _, q = self.stored(case, sha, 1, 0)
            if not q and len(self.archive.get(name.encode(), [])) != 1:
                q = ["not archived once"]
            if q:
                bad += 1
                if bad <= 5:
                    p.append(f"{name}: {'; '.join(q)}")
        if bad > 5:
            p.append(f"... {bad} files wrong in all")
        self.report(case, f"{case['count'] - bad} of {case['count']} ingested", p)

    def whole_or_none(self, case, race):
        delay, deleted = race
        row = self.files.get(case["sha256"])
        prefix = case["name"].split("-")[1].split(".")[0]
        stored = self.count("SELECT COUNT(*) FROM records WHERE record_id LIKE ?", f"VAN{prefix}-%")
        p = []
        if row is None:
            observed = "none"
            if stored:
                p.append(f"{stored} records stored without its file row")
        else:
            observed = "whole"
            _, p = self.stored(case, case["sha256"], case["records"], 0)
            if stored != case["records"]:
                p.append(f"{stored} records carry its ids, expected {case['records']}")
        inbox_copy = os.path.join(self.inbox, os.fsencode(case["name"]))
        if os.path.lexists(inbox_copy):
            p.append("still in the inbox after it was deleted")
        if not deleted and observed != "whole":
            p.append("taken by the daemon before the deletion, yet not stored whole")
        when = f"deleted after {delay:.2f} s" if deleted else f"taken before the deletion at {delay:.2f} s"
        self.report(case, f"{observed} ({when})", p)

    def never_outside(self, case):
        """A file replaced by a symlink to an outside file while the daemon
        worked: the outside file must never be read."""
        target = os.path.join(self.corpus, "outside", case["swap_target"])
        tsha = case["target_sha256"]
        p = []
        if not os.path.isfile(target) or sha_file(target) != tsha:
            p.append("the outside file was moved or changed")
        size = os.path.getsize(target) if os.path.isfile(target) else -1
        copies = []
        for where, files in (("archive", self.archive), ("quarantine", self.quarantine)):
            for paths in files.values():
                for path in paths:
                    if os.path.getsize(path) == size and sha_file(path) == tsha:
                        copies.append(f"{where}/{os.fsdecode(os.path.basename(path))}")
        if copies:
            p.append(f"the outside file was copied into {', '.join(copies)}")
        if tsha in self.files:
            p.append(f"the outside file was stored as {self.files[tsha][1]!r} ({self.files[tsha][3]})")
        n = self.count("SELECT COUNT(*) FROM records WHERE record_id LIKE ?", case["target_prefix"] + "-%")
        if n:
            p.append(f"{n} records of the outside file stored")
        original = case["sha256"] in self.files
        if original:
            self.expected_files.add(case["sha256"])
        observed = "original stored" if original else "original not stored"
        if copies or tsha in self.files:
            observed = "OUTSIDE FILE READ"
        self.report(case, observed, p)

    # --- across cases -----------------------------------------------------------
    def late(self, case):
        self.ingested(case)
        n = self.count("SELECT COUNT(*) FROM source_files WHERE name = ?", case["name"])
        if n != 1:
            self.failures.append(f"late/{case['name']}: {n} source_files rows, expected 1 (a partial read?)")
            self.rows[-1] = self.rows[-1][:3] + ("WRONG", False)

    def global_checks(self, manifest):
        for prefix in FORBIDDEN_PREFIXES:
            n = self.count("SELECT COUNT(*) FROM records WHERE record_id LIKE ?", prefix + "%")
            if n:
                self.failures.append(f"{n} records stored from content that must not be (ids {prefix}...)")
        extra = [r for sha, r in self.files.items() if sha not in self.expected_files]
        if extra:
            self.failures.append(
                f"{len(extra)} unexpected source_files rows, e.g. {extra[0][1]!r} {extra[0][3]}")
        for root in [self.site, self.corpus, os.getcwd()]:
            for k in (1, 2, 3):
                if os.path.lexists(os.path.join(root, f"SW_PWNED_{k}")):
                    self.failures.append(f"SW_PWNED_{k} exists in {root}: a file name was run as a command")
        self.rows.append(("global", "no command run from a file name", "none", "checked", True))

    def mail(self, manifest):
        outbox = os.path.join(self.site, "data", "outbox")
        paths = sorted(glob.glob(os.path.join(outbox, "*.eml")))
        problems = []
        texts = []
        for path in paths:
            raw = open(path, "rb").read()
            head = re.split(rb"\r?\n\r?\n", raw, maxsplit=1)[0]
            for line in re.split(rb"\r?\n", head):
                if line[:1] in (b" ", b"\t"):
                    continue
                m = re.match(rb"^([A-Za-z0-9-]+):", line)
                if not m or m.group(1).decode().lower() not in ALLOWED_HEADERS:
                    problems.append(f"{os.path.basename(path)}: header line {line[:80]!r}")
            msg = email.message_from_bytes(raw, policy=email.policy.default)
            for part in msg.walk():
                for key in part.keys():
                    if key.lower() not in ALLOWED_HEADERS:
                        problems.append(f"{os.path.basename(path)}: header {key!r} in a part")
            if len(msg.get_all("Subject") or []) != 1:
                problems.append(f"{os.path.basename(path)}: not exactly one Subject")
            for key in ("To", "Cc", "Bcc"):
                for v in msg.get_all(key) or []:
                    if "intruder" in str(v):
                        problems.append(f"{os.path.basename(path)}: {key} names the intruder")
            subject = str(msg.get("Subject", ""))
            if "\r" in subject or "\n" in subject:
                problems.append(f"{os.path.basename(path)}: a line break in the decoded subject")
            plain, html = "", ""
            for part in msg.walk():
                if part.get_content_type() == "text/plain":
                    plain += part.get_content()
                elif part.get_content_type() == "text/html":
                    html += part.get_content()
            texts.append((subject, plain, html))
        for case in manifest["cases"]:
            token = case.get("mail_token")
            if not token:
                continue
            hits = [t for t in texts if token in t[0] or token in t[1]]
            p = []
            if not hits:
                p.append(f"no message mentions {token!r}, so its header safety went untested")
            for forbidden in [case.get("html_forbidden")] if case.get("html_forbidden") else []:
                if any(forbidden in t[2] for t in hits):
                    p.append(f"{forbidden!r} unescaped in an HTML part")
            self.rows.append(("mail", f"messages about {token}", "safe headers",
                              f"{len(hits)} message(s)" if not p else "WRONG", not p))
            for x in p:
                self.failures.append(f"mail/{token}: {x}")
        self.rows.append(("mail", f"{len(paths)} .eml files, every header line",
                          "no injected header", "clean" if not problems else f"{len(problems)} bad", not problems))
        self.failures.extend(problems[:20])
        if not paths:
            self.failures.append("no .eml in the outbox: the header checks tested nothing")

    def run(self):
        manifest = json.load(open(os.path.join(self.corpus, "manifest.json")))
        delays = {r["name"]: (r["delay"], r.get("deleted", True)) for r in self.races}
        for case in manifest["cases"]:
            kind, group = case["expect"], case["group"]
            if group == "race":
                if case["name"] in delays:
                    self.whole_or_none(case, delays[case["name"]])
            elif group == "late":
                self.late(case)
            elif kind == "ingested":
                self.ingested(case)
            elif kind == "quarantined":
                self.quarantined(case)
            elif kind == "ignored":
                self.ignored(case)
            elif kind == "ingested-each":
                self.tiny(case)
            elif kind == "never-outside":
                self.never_outside(case)
            else:
                self.failures.append(f"unknown expectation {kind!r}")
        self.global_checks(manifest)
        self.mail(manifest)


def main():
    p = argparse.ArgumentParser()
    p.add_argument("site")
    p.add_argument("corpus")
    p.add_argument("--races", help="JSON list of {name, delay}")
    a = p.parse_args()
    races = json.load(open(a.races)) if a.races else []
    c = Checker(a.site, a.corpus, races)
    c.run()
    print(f"{'group':<7} {'case':<46} {'expected':<18} {'observed':<32} ok")
    print("-" * 108)
    for group, name, expect, observed, ok in c.rows:
        print(f"{group:<7} {name:<46} {expect:<18} {observed:<32} {'ok' if ok else 'FAIL'}")
    if c.failures:
        print(f"\n{len(c.failures)} problem(s):")
        for f in c.failures:
            print("  - " + f)
        return 1
    print(f"\nall {len(c.rows)} checks passed")
    return 0


if __name__ == "__main__":
    sys.exit(main())
