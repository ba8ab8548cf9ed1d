BEGIN TRANSACTION;
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
INSERT INTO "departures" VALUES(1,1,2,'F1','Alder Invented plc','Energy',2001,'2001-03-01','Dismissed','A. Person',55.0,3.0,0,NULL,'{"row": 0}');
INSERT INTO "departures" VALUES(2,1,3,'F1','Alder Invented plc','Energy',2005,NULL,'Retired','B. Person',64.0,9.0,0,NULL,'{"row": 1}');
INSERT INTO "departures" VALUES(3,1,4,'F2','Birch Made-up Ltd','Retail',2003,'2003-06-30','Dismissed','C. Person',NULL,2.0,1,NULL,'{"row": 2}');
INSERT INTO "departures" VALUES(4,1,5,'F3','Cedar Fictional SA','Retail',2004,NULL,'Resigned','D. Person',50.0,NULL,NULL,NULL,'{"row": 3}');
CREATE TABLE mapping_entries (
	version_id INTEGER NOT NULL, 
	code VARCHAR NOT NULL, 
	category VARCHAR NOT NULL, 
	label VARCHAR NOT NULL, 
	UNIQUE (version_id, code), 
	FOREIGN KEY(version_id) REFERENCES mapping_versions (id) ON DELETE CASCADE
);
INSERT INTO "mapping_entries" VALUES(1,'Dismissed','forced','');
INSERT INTO "mapping_entries" VALUES(1,'Retired','voluntary','');
INSERT INTO "mapping_entries" VALUES(1,'Resigned','voluntary','');
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
INSERT INTO "mapping_versions" VALUES(1,1,1,'2026-12-02T04:29:35+00:00','t','n');
CREATE TABLE mappings (
	id INTEGER NOT NULL, 
	name VARCHAR NOT NULL, 
	created_at VARCHAR NOT NULL, 
	PRIMARY KEY (id), 
	UNIQUE (name)
);
INSERT INTO "mappings" VALUES(1,'legacy-map','2026-12-02T04:29:35+00:00');
CREATE TABLE rejected_rows (
	id INTEGER NOT NULL, 
	roster_id INTEGER NOT NULL, 
	line INTEGER NOT NULL, 
	raw TEXT NOT NULL, 
	reason TEXT NOT NULL, 
	PRIMARY KEY (id), 
	FOREIGN KEY(roster_id) REFERENCES rosters (id) ON DELETE CASCADE
);
INSERT INTO "rejected_rows" VALUES(1,1,6,'bad,row','no year');
CREATE TABLE roster_settings (
	roster_id INTEGER NOT NULL, 
	mapping_name VARCHAR, 
	window_from INTEGER, 
	window_to INTEGER, 
	PRIMARY KEY (roster_id), 
	FOREIGN KEY(roster_id) REFERENCES rosters (id) ON DELETE CASCADE
);
INSERT INTO "roster_settings" VALUES(1,NULL,NULL,NULL);
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
INSERT INTO "rosters" VALUES(1,'Legacy roster','legacy.csv','0000000000000000000000000000000000000000000000000000000000000000','2026-12-02T04:29:35+00:00',5,4,1,0,'{"firm_id": "Firm", "year": "Year", "reason": "Reason"}');
CREATE TABLE run_replicates (
	run_id INTEGER NOT NULL, 
	seq INTEGER NOT NULL, 
	count INTEGER NOT NULL, 
	data BLOB NOT NULL, 
	failures BLOB NOT NULL, 
	UNIQUE (run_id, seq), 
	FOREIGN KEY(run_id) REFERENCES runs (id) ON DELETE CASCADE
);
INSERT INTO "run_replicates" VALUES(1,0,2,X'789C636000810FF6608AE1473D000E1602A7',X'789CE32A4E2D482C4A2CC9CCCF030017930441');
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
INSERT INTO "runs" VALUES(1,'fit',1,'done','2026-12-02T04:29:35+00:00',NULL,'2026-12-02T04:29:35+00:00','legacy-map',1,2001,2005,'{"model": "linear"}','f',0,0,0,'{"odds_ratio": 1.0}',NULL,0.1);
CREATE TABLE schema_version (
	version INTEGER NOT NULL
);
INSERT INTO "schema_version" VALUES(1);
CREATE INDEX ix_rosters_sha256 ON rosters (sha256);
CREATE INDEX ix_departures_roster_id ON departures (roster_id);
CREATE INDEX ix_rejected_rows_roster_id ON rejected_rows (roster_id);
CREATE INDEX ix_runs_roster_id ON runs (roster_id);
CREATE INDEX ix_mapping_entries_version_id ON mapping_entries (version_id);
CREATE INDEX ix_run_replicates_run_id ON run_replicates (run_id);
COMMIT;
