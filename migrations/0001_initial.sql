-- slopewarden store, first schema.
-- Rules: migrations are append-only; a shipped file is never edited.

-- Every file taken from the inbox, once per distinct content.
CREATE TABLE source_files (
    id           INTEGER PRIMARY KEY,
    name         TEXT    NOT NULL,          -- path relative to the inbox
    sha256       TEXT    NOT NULL UNIQUE,   -- content hash: the same bytes are never ingested twice
    size         INTEGER NOT NULL,
    arrived_at   TEXT    NOT NULL,          -- RFC 3339, UTC
    feed         TEXT    NOT NULL,
    outcome      TEXT    NOT NULL CHECK (outcome IN ('ingested', 'partial', 'quarantined')),
    records_new  INTEGER NOT NULL,
    records_same INTEGER NOT NULL,          -- already stored with identical values
    records_conflict INTEGER NOT NULL,      -- id stored with other values: kept as proposed versions
    records_bad  INTEGER NOT NULL,          -- rows refused by validation
    detail       TEXT                       -- why quarantined, when it was
);

-- One row per series key with its settings. Its running state is its
-- latest row of `fits`; its fit versions and its records are chained
-- newest to oldest (fits.prev_fit, records.prev_in_series), so a file that
-- touches a thousand series appends rows instead of updating a thousand
-- scattered index pages.
CREATE TABLE series (
    id           INTEGER PRIMARY KEY,
    key          TEXT    NOT NULL UNIQUE,
    unit         TEXT,
    transform    TEXT    NOT NULL,
    non_detects  TEXT    NOT NULL,          -- 'exclude' or 'substitute:<fraction>'
    latest_fit   INTEGER,                   -- fits.id of the current version
    latest_record INTEGER                   -- records.id of the newest current record
);

-- Records with provenance. Every record id starts at version 1; a
-- resubmission with other values is a later, 'proposed' version awaiting
-- review, so "is this id stored?" is "does its version 1 exist?".
CREATE TABLE records (
    id           INTEGER PRIMARY KEY,
    record_id    TEXT    NOT NULL,
    version      INTEGER NOT NULL,
    status       TEXT    NOT NULL CHECK (status IN ('current', 'proposed', 'superseded')),
    series_id    INTEGER NOT NULL REFERENCES series(id),
    x            REAL    NOT NULL,
    y            REAL    NOT NULL,          -- the value, or the limit of a non-detect
    censored     INTEGER NOT NULL,
    in_fit       INTEGER NOT NULL,          -- whether it entered the series' fit
    fit_x        REAL,                      -- on the fitted scale, when in the fit
    fit_y        REAL,
    unit         TEXT,
    unit_as_written TEXT,
    sampled_at   TEXT,
    note         TEXT,
    attributes   TEXT,                      -- JSON object of the extra columns
    file_id      INTEGER NOT NULL REFERENCES source_files(id),
    line         INTEGER NOT NULL,
    raw          TEXT    NOT NULL,
    prev_in_series INTEGER,                 -- the series' previous current record
    -- the record's own diagnostics in the fit it joined on arrival
    -- (NULL while the series was too short, or when it is not in the fit)
    joined_fit   INTEGER,                   -- fit version it joined
    leverage     REAL,
    standardized_residual REAL,
    studentized_residual  REAL,
    cooks_distance        REAL,
    dffits       REAL,
    dfbetas_intercept REAL,
    dfbetas_slope     REAL,
    covariance_ratio  REAL,
    prediction_t REAL,                      -- against the fit before it arrived
    slope_without REAL,                     -- that previous fit's slope
    slope_p_without REAL,
    undefined    TEXT,                      -- why some measures are absent
    UNIQUE (record_id, version)
);

-- Rows refused by validation, with where and why.
CREATE TABLE quarantined_rows (
    id           INTEGER PRIMARY KEY,
    file_id      INTEGER NOT NULL REFERENCES source_files(id),
    line         INTEGER NOT NULL,
    col          INTEGER,
    field        TEXT,
    record_id    TEXT,
    reason       TEXT    NOT NULL,
    raw          TEXT    NOT NULL
);

-- One row per refit: how each trend estimate came to be.
CREATE TABLE fits (
    id           INTEGER PRIMARY KEY,
    series_id    INTEGER NOT NULL REFERENCES series(id),
    version      INTEGER NOT NULL,
    trigger_file INTEGER REFERENCES source_files(id),
    created_at   TEXT    NOT NULL,
    transform    TEXT    NOT NULL,
    non_detects  TEXT    NOT NULL,
    n            INTEGER NOT NULL,
    n_censored   INTEGER NOT NULL,          -- non-detects stored for the series
    level        REAL    NOT NULL,
    slope        REAL,
    intercept    REAL,
    slope_se     REAL,
    intercept_se REAL,
    slope_t      REAL,
    slope_p      REAL,
    slope_ci_low REAL,
    slope_ci_high REAL,
    r_squared    REAL,
    residual_sd  REAL,
    df           INTEGER,
    theil_sen_slope   REAL,                 -- robust slope, when computed for this version
    theil_sen_ci_low  REAL,
    theil_sen_ci_high REAL,
    mann_kendall_s    INTEGER,
    mann_kendall_p    REAL,
    note         TEXT,                      -- why a statistic is absent
    -- the series' running state after this version, to resume exactly:
    records      INTEGER NOT NULL,          -- current record versions stored
    robust_n     INTEGER NOT NULL,          -- n when the robust slope was last computed
    origin       REAL    NOT NULL,          -- co-moments of the points in the fit
    mean_x       REAL    NOT NULL,
    mean_y       REAL    NOT NULL,
    sxx          REAL    NOT NULL,
    sxy          REAL    NOT NULL,
    syy          REAL    NOT NULL,
    sse          REAL    NOT NULL,
    prev_fit     INTEGER                    -- the series' previous version
);

-- Append-only audit trail; each entry carries the SHA-256 of the previous one.
CREATE TABLE audit_log (
    id           INTEGER PRIMARY KEY,
    at           TEXT    NOT NULL,
    kind         TEXT    NOT NULL,
    subject      TEXT    NOT NULL,
    detail       TEXT    NOT NULL,
    prev_hash    TEXT    NOT NULL,
    hash         TEXT    NOT NULL
);
