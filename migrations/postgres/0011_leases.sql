-- Several servers on one PostgreSQL database: who owns what. A lease is
-- held by one server (`owner`, an id made at its start) until
-- `expires_ms` on the database's own clock (servers' clocks may differ);
-- the owner renews it well before then. `token` goes up by one whenever
-- the lease passes to another owner: every write for a channel checks it
-- (fencing), so a server that stalled past its lease cannot write after
-- another took over. Names: 'channel:<channel_key>', 'notify:<target>'.
CREATE TABLE leases (
    name       TEXT PRIMARY KEY,
    owner      TEXT NOT NULL,
    owner_addr TEXT NOT NULL,
    token      BIGINT NOT NULL,
    expires_ms BIGINT NOT NULL
);
CREATE INDEX leases_by_owner ON leases (owner);
