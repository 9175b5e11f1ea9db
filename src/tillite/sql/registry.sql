-- What `tillite macros install` put into this database, so that `tillite macros remove`
-- drops those macros and nothing else.
CREATE TABLE IF NOT EXISTS {{registry}} (
    macro_name VARCHAR PRIMARY KEY,
    macro_type VARCHAR NOT NULL,
    model_name VARCHAR,
    tillite_version VARCHAR,
    installed_at TIMESTAMP WITH TIME ZONE
);
