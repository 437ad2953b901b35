-- DDL of the published kaledger database (schema version 1).
-- Only portable DuckDB types (VARCHAR, BIGINT, INTEGER, DOUBLE, BOOLEAN) so that the DuckDB CLI,
-- R and every other DuckDB client read the file. JSON parameters are stored as VARCHAR text.

CREATE TABLE sources (
    source_id          VARCHAR PRIMARY KEY,
    title              VARCHAR NOT NULL,
    citation           VARCHAR NOT NULL,
    license            VARCHAR NOT NULL,   -- SPDX identifier
    url                VARCHAR,
    retrieved          VARCHAR,            -- ISO date the steward retrieved the table
    kind               VARCHAR NOT NULL,   -- experimental | critical_review | compilation | estimated
    file               VARCHAR NOT NULL,   -- data file, relative to raw/
    file_sha256        VARCHAR NOT NULL,
    descriptor_sha256  VARCHAR NOT NULL,
    row_count          BIGINT  NOT NULL,   -- data rows read from the file
    accepted           BIGINT  NOT NULL,   -- rows that became measurements
    rejected           BIGINT  NOT NULL    -- rows that went to rejects
);

CREATE TABLE compounds (
    compound_id  VARCHAR PRIMARY KEY,      -- standard InChIKey of the parent, or 'unresolved:<name>'
    name         VARCHAR,
    inchikey     VARCHAR,
    smiles       VARCHAR,                  -- canonical SMILES of the neutral parent (RDKit)
    cas          VARCHAR,
    formula      VARCHAR,
    resolved_by  VARCHAR                   -- smiles | inchi | synonym | cas | name
);

CREATE TABLE measurements (
    value_id              VARCHAR PRIMARY KEY,
    compound_id           VARCHAR NOT NULL,
    step                  INTEGER,         -- 1 = most protonated form loses the first proton
    step_inferred         BOOLEAN NOT NULL,
    pka                   DOUBLE  NOT NULL,  -- pKa of the acid form (conjugate acid for bases)
    pka_uncertainty       DOUBLE,
    qualifier             VARCHAR,         -- <, >, <=, >=, ~ as reported
    temperature_k         DOUBLE  NOT NULL,
    ionic_strength_molal  DOUBLE  NOT NULL,  -- mol/kg
    medium                VARCHAR,         -- background electrolyte, e.g. KCl
    solvent               VARCHAR NOT NULL,  -- controlled vocabulary; 'water' for aqueous
    constant_type         VARCHAR NOT NULL,  -- thermodynamic | concentration | mixed
    charge                INTEGER,         -- charge of the acid form, when given
    quantity_reported     VARCHAR NOT NULL,  -- pKa | Ka | pKb | Kb | logK
    value_reported        VARCHAR NOT NULL,  -- the cell text as read
    pkw_used              DOUBLE,          -- pKw applied for a pKb/Kb conversion
    quantity_alt_reported VARCHAR,         -- a second quantity the same row reports (e.g. Ka beside pKa)
    value_alt_reported    VARCHAR,         -- its cell text
    pka_alt               DOUBLE,          -- the pKa that second cell gives, for the cross-check
    name_reported         VARCHAR,
    cas_reported          VARCHAR,
    smiles_reported       VARCHAR,
    species_smiles        VARCHAR,         -- canonical SMILES of the species as given (salt/charge kept)
    method                VARCHAR,
    reference             VARCHAR,         -- primary reference the source cites
    source_id             VARCHAR NOT NULL,
    source_row            BIGINT  NOT NULL,  -- row number in the file (header = first row)
    copy_of               VARCHAR,         -- value_id of the measurement this row repeats
    status                VARCHAR NOT NULL   -- ok | flagged | excluded
);

CREATE TABLE rejects (
    source_id   VARCHAR NOT NULL,
    source_row  BIGINT  NOT NULL,
    field       VARCHAR NOT NULL,
    raw_text    VARCHAR,
    reason      VARCHAR NOT NULL
);

CREATE TABLE findings (
    rule         VARCHAR NOT NULL,
    severity     VARCHAR NOT NULL,          -- error | warning | info
    value_id     VARCHAR,
    compound_id  VARCHAR,
    source_id    VARCHAR,
    source_row   BIGINT,
    message      VARCHAR NOT NULL
);

CREATE TABLE recommended (
    recommendation_id     VARCHAR PRIMARY KEY,
    compound_id           VARCHAR NOT NULL,
    step                  INTEGER,
    temperature_k         DOUBLE  NOT NULL,
    ionic_strength_molal  DOUBLE  NOT NULL,
    constant_type         VARCHAR NOT NULL,
    pka                   DOUBLE  NOT NULL,
    pka_uncertainty       DOUBLE,
    n_values              BIGINT  NOT NULL,  -- independent measurements used
    n_sources             BIGINT  NOT NULL,
    method                VARCHAR NOT NULL,  -- weighted_mean | median_mad | single
    birge_ratio           DOUBLE,
    category              VARCHAR NOT NULL,  -- Recommended | Tentative | Doubtful (IUPAC)
    reason                VARCHAR NOT NULL
);

CREATE TABLE lineage (
    target_id   VARCHAR NOT NULL,          -- a value_id or a recommendation_id
    step_no     INTEGER NOT NULL,          -- 1 = oldest step (the source cell)
    operation   VARCHAR NOT NULL,
    parameters  VARCHAR NOT NULL,          -- JSON object
    inputs      VARCHAR NOT NULL           -- JSON array of value ids or source cells
);

CREATE TABLE build_info (
    key    VARCHAR PRIMARY KEY,
    value  VARCHAR NOT NULL
);
