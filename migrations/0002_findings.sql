-- Findings raised by the rules, and the messages that tell the analyst.
-- Rules: migrations are append-only; a shipped file is never edited.

-- The x range of the fit and the trend's hysteresis state, per version.
ALTER TABLE fits ADD COLUMN x_min REAL;
ALTER TABLE fits ADD COLUMN x_max REAL;
ALTER TABLE fits ADD COLUMN significant INTEGER NOT NULL DEFAULT 0;

-- One row per finding: a record (or a file, or a trend) that deserves a
-- check. `detail` is a JSON document with the numbers, the cutoffs and
-- their sources, the fits with and without the record, the ranked causes.
CREATE TABLE findings (
    id           INTEGER PRIMARY KEY,
    created_at   TEXT    NOT NULL,
    series_id    INTEGER REFERENCES series(id),
    file_id      INTEGER REFERENCES source_files(id),
    record_row   INTEGER REFERENCES records(id),
    record_ids   TEXT    NOT NULL,          -- JSON array of record ids concerned
    kinds        TEXT    NOT NULL,          -- JSON array of finding kinds
    severity     TEXT    NOT NULL CHECK (severity IN ('notice', 'warning', 'alert')),
    status       TEXT    NOT NULL CHECK (status IN ('open', 'confirmed', 'corrected', 'excluded', 'closed')),
    fit_version  INTEGER,
    fit_x        REAL,                      -- the record's point on the fitted scale,
    fit_y        REAL,                      -- kept out of judging while it awaits review
    summary      TEXT    NOT NULL,
    detail       TEXT    NOT NULL
);
CREATE INDEX findings_by_status ON findings(status, series_id);

-- Messages to send, written in the same transaction as their finding.
-- One row per finding and recipient; a digest row has no finding.
CREATE TABLE outbox (
    id           INTEGER PRIMARY KEY,
    finding_id   INTEGER REFERENCES findings(id),
    recipient    TEXT    NOT NULL,
    message_id   TEXT    NOT NULL,
    subject      TEXT    NOT NULL,
    body_text    TEXT    NOT NULL,
    body_html    TEXT    NOT NULL,
    chart        BLOB,
    chart_cid    TEXT,
    date_unix    INTEGER NOT NULL,
    status       TEXT    NOT NULL CHECK (status IN ('pending', 'sent', 'held', 'digested', 'failed')),
    attempts     INTEGER NOT NULL DEFAULT 0,
    next_attempt_unix INTEGER NOT NULL,
    last_error   TEXT,
    sent_unix    INTEGER,
    UNIQUE (message_id, recipient)
);
CREATE INDEX outbox_by_status ON outbox(status, next_attempt_unix);

-- A random token per database: Message-IDs derive from it and the finding
-- id, so two installations, or a database rebuilt from scratch, never
-- reuse a Message-ID that mail systems would take for a duplicate.
CREATE TABLE store_identity (token TEXT NOT NULL);
INSERT INTO store_identity (token) VALUES (lower(hex(randomblob(6))));
