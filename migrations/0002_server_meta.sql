-- Small key/value facts about the server and its database. The write
-- probe that tells health when writes succeed again updates a row here.
CREATE TABLE server_meta (
    key   TEXT PRIMARY KEY NOT NULL,
    value TEXT NOT NULL
);
