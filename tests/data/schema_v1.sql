-- The schema of Helmshift 0.1.0 (schema_version 1), as SQLite stored it; used by
-- tests/test_hardening.py to check that later migrations upgrade such a database in place.
CREATE TABLE schema_version (
	version INTEGER NOT NULL
);
CREATE TABLE rosters (
	id INTEGER NOT NULL, 
	name VARCHAR NOT NULL, 
	source_name VARCHAR NOT NULL, 
	sha256 VARCHAR(64) NOT NULL, 
	imported_at VARCHAR NOT NULL, 
	rows_total INTEGER NOT NULL, 
	accepted INTEGER NOT NULL, 
	rejected INTEGER NOT NULL, 
	duplicates INTEGER NOT NULL, 
	columns TEXT NOT NULL, 
	PRIMARY KEY (id), 
	UNIQUE (name)
);
CREATE INDEX ix_rosters_sha256 ON rosters (sha256);
CREATE TABLE mappings (
	id INTEGER NOT NULL, 
	name VARCHAR NOT NULL, 
	created_at VARCHAR NOT NULL, 
	PRIMARY KEY (id), 
	UNIQUE (name)
);
CREATE TABLE departures (
	id INTEGER NOT NULL, 
	roster_id INTEGER NOT NULL, 
	line INTEGER NOT NULL, 
	firm_id VARCHAR NOT NULL, 
	firm_name VARCHAR, 
	sector VARCHAR, 
	year INTEGER NOT NULL, 
	date VARCHAR, 
	reason VARCHAR NOT NULL, 
	executive VARCHAR, 
	age FLOAT, 
	tenure FLOAT, 
	interim BOOLEAN, 
	notes TEXT, 
	raw TEXT NOT NULL, 
	PRIMARY KEY (id), 
	FOREIGN KEY(roster_id) REFERENCES rosters (id) ON DELETE CASCADE
);
CREATE INDEX ix_departures_roster_id ON departures (roster_id);
CREATE TABLE rejected_rows (
	id INTEGER NOT NULL, 
	roster_id INTEGER NOT NULL, 
	line INTEGER NOT NULL, 
	raw TEXT NOT NULL, 
	reason TEXT NOT NULL, 
	PRIMARY KEY (id), 
	FOREIGN KEY(roster_id) REFERENCES rosters (id) ON DELETE CASCADE
);
CREATE INDEX ix_rejected_rows_roster_id ON rejected_rows (roster_id);
CREATE TABLE mapping_versions (
	id INTEGER NOT NULL, 
	mapping_id INTEGER NOT NULL, 
	version INTEGER NOT NULL, 
	created_at VARCHAR NOT NULL, 
	author VARCHAR NOT NULL, 
	note TEXT NOT NULL, 
	PRIMARY KEY (id), 
	UNIQUE (mapping_id, version), 
	FOREIGN KEY(mapping_id) REFERENCES mappings (id) ON DELETE CASCADE
);
CREATE TABLE roster_settings (
	roster_id INTEGER NOT NULL, 
	mapping_name VARCHAR, 
	window_from INTEGER, 
	window_to INTEGER, 
	PRIMARY KEY (roster_id), 
	FOREIGN KEY(roster_id) REFERENCES rosters (id) ON DELETE CASCADE
);
CREATE TABLE runs (
	id INTEGER NOT NULL, 
	kind VARCHAR NOT NULL, 
	roster_id INTEGER NOT NULL, 
	status VARCHAR NOT NULL, 
	created_at VARCHAR NOT NULL, 
	started_at VARCHAR, 
	finished_at VARCHAR, 
	mapping_name VARCHAR, 
	mapping_version INTEGER, 
	window_from INTEGER, 
	window_to INTEGER, 
	params TEXT NOT NULL, 
	fingerprint VARCHAR NOT NULL, 
	progress_done INTEGER NOT NULL, 
	progress_total INTEGER NOT NULL, 
	cancel_requested BOOLEAN NOT NULL, 
	result TEXT, 
	error TEXT, 
	seconds FLOAT, 
	PRIMARY KEY (id), 
	FOREIGN KEY(roster_id) REFERENCES rosters (id) ON DELETE CASCADE
);
CREATE INDEX ix_runs_roster_id ON runs (roster_id);
CREATE TABLE mapping_entries (
	version_id INTEGER NOT NULL, 
	code VARCHAR NOT NULL, 
	category VARCHAR NOT NULL, 
	label VARCHAR NOT NULL, 
	UNIQUE (version_id, code), 
	FOREIGN KEY(version_id) REFERENCES mapping_versions (id) ON DELETE CASCADE
);
CREATE INDEX ix_mapping_entries_version_id ON mapping_entries (version_id);
CREATE TABLE run_replicates (
	run_id INTEGER NOT NULL, 
	seq INTEGER NOT NULL, 
	count INTEGER NOT NULL, 
	data BLOB NOT NULL, 
	failures BLOB NOT NULL, 
	UNIQUE (run_id, seq), 
	FOREIGN KEY(run_id) REFERENCES runs (id) ON DELETE CASCADE
);
CREATE INDEX ix_run_replicates_run_id ON run_replicates (run_id);
