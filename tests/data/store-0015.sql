BEGIN TRANSACTION;
CREATE TABLE accounts (
	id INTEGER NOT NULL PRIMARY KEY AUTOINCREMENT, 
	name VARCHAR NOT NULL, 
	role VARCHAR NOT NULL, 
	password_hash VARCHAR NOT NULL, 
	created_at VARCHAR NOT NULL, 
	session_epoch INTEGER NOT NULL, 
	UNIQUE (name)
);
CREATE TABLE alembic_version (
	version_num VARCHAR(32) NOT NULL, 
	PRIMARY KEY (version_num)
);
INSERT INTO "alembic_version" VALUES('0015');
CREATE TABLE api_tokens (
	id INTEGER NOT NULL PRIMARY KEY AUTOINCREMENT, 
	account_id INTEGER NOT NULL, 
	token_sha256 VARCHAR(64) NOT NULL, 
	created_at VARCHAR NOT NULL, 
	FOREIGN KEY(account_id) REFERENCES accounts (id) ON DELETE CASCADE, 
	UNIQUE (token_sha256)
);
CREATE TABLE app_secrets (
	name VARCHAR NOT NULL, 
	value VARCHAR NOT NULL, 
	PRIMARY KEY (name)
);
CREATE TABLE audit_events (
	id INTEGER NOT NULL PRIMARY KEY AUTOINCREMENT, 
	at VARCHAR NOT NULL, 
	actor VARCHAR NOT NULL, 
	action VARCHAR NOT NULL, 
	target VARCHAR NOT NULL, 
	detail TEXT NOT NULL
);
INSERT INTO "audit_events" VALUES(1,'2026-12-02T13:39:24+00:00','local analyst','import','roster:1','{"accepted": 7, "name": "Desk roster", "rejected": 1, "source": "desk.csv"}');
INSERT INTO "audit_events" VALUES(2,'2026-12-02T13:39:25+00:00','local analyst','import_version','roster:1','{"accepted": 7, "name": "Desk roster", "rejected": 1, "source": "desk-2.csv", "version": 2}');
CREATE TABLE briefing_settings (
	roster_id INTEGER NOT NULL, 
	title VARCHAR NOT NULL, 
	author VARCHAR NOT NULL, 
	marking VARCHAR NOT NULL, 
	date VARCHAR NOT NULL, 
	takeaways TEXT NOT NULL, 
	updated_at VARCHAR NOT NULL, 
	PRIMARY KEY (roster_id), 
	FOREIGN KEY(roster_id) REFERENCES rosters (id) ON DELETE CASCADE
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
	reason_raw VARCHAR, 
	executive VARCHAR, 
	age FLOAT, 
	tenure FLOAT, 
	interim BOOLEAN, 
	notes TEXT, 
	raw TEXT NOT NULL, 
	announced VARCHAR, 
	notice_days INTEGER, 
	version INTEGER DEFAULT '1' NOT NULL, 
	PRIMARY KEY (id), 
	FOREIGN KEY(roster_id) REFERENCES rosters (id) ON DELETE CASCADE
);
INSERT INTO "departures" VALUES(1,1,2,'F1',NULL,'Mining',2001,'2001-03-04','Retired','Retired','A. One',61.5,3.99,0,'said "bye"','{"Firm": "F1", "Company": "Alpha, Inc", "Sector": "Mining", "FY": "2001", "Exit date": "2001-03-04", "Announced": "2000-12-01", "Reason": "Retired", "CEO": "A. One", "Age": "61.5", "Tenure": "3.99", "Interim": "no", "Note": "said \"bye\""}','2000-12-01',93,1);
INSERT INTO "departures" VALUES(2,1,3,'F2',NULL,NULL,2001,NULL,'Still in post','Still in post','B. Two',NULL,NULL,NULL,NULL,'{"Firm": "F2", "Company": "Béta Ltd", "Sector": "", "FY": "2001", "Exit date": "", "Announced": "", "Reason": "Still in post", "CEO": "B. Two", "Age": "", "Tenure": "", "Interim": "", "Note": ""}',NULL,NULL,1);
INSERT INTO "departures" VALUES(3,1,4,'F3',NULL,'Retail',2002,'2002-06-30','dismissed','dismissed ','C. Three',48.0,12.0,1,'note % 1','{"Firm": "F3", "Company": "Gamma", "Sector": "Retail", "FY": "2002", "Exit date": "2002-06-30", "Announced": "2002-06-01", "Reason": "dismissed ", "CEO": "C. Three", "Age": "48", "Tenure": "12", "Interim": "yes", "Note": "note % 1"}','2002-06-01',29,1);
INSERT INTO "departures" VALUES(4,1,5,'F1',NULL,'Mining',2003,'2003-01-15','dismissed','Dismissed','D. Four',55.25,0.5,NULL,NULL,'{"Firm": "F1", "Company": "Alpha, Inc", "Sector": "Mining", "FY": "2003", "Exit date": "2003-01-15", "Announced": "", "Reason": "Dismissed", "CEO": "D. Four", "Age": "55.25", "Tenure": "0.5", "Interim": "", "Note": ""}',NULL,NULL,1);
INSERT INTO "departures" VALUES(5,1,7,'F5',NULL,'Banks',2004,'2004-09-09','Health','Health','F. Six',66.0,7.25,0,'ünï','{"Firm": "F5", "Company": "Epsilon", "Sector": "Banks", "FY": "2004", "Exit date": "2004-09-09", "Announced": "2004-01-01", "Reason": "Health", "CEO": "F. Six", "Age": "66", "Tenure": "7.25", "Interim": "no", "Note": "ünï"}','2004-01-01',252,1);
INSERT INTO "departures" VALUES(6,1,8,'F6',NULL,'Banks',2004,'2004-10-10','Retired','Retired','G. Seven',59.9,3.0,1,NULL,'{"Firm": "F6", "Company": "Zeta", "Sector": "Banks", "FY": "2004", "Exit date": "2004-10-10", "Announced": "", "Reason": "Retired", "CEO": "G. Seven", "Age": "59.9", "Tenure": "3", "Interim": "yes", "Note": ""}',NULL,NULL,1);
INSERT INTO "departures" VALUES(7,1,9,'F7',NULL,'Mining',2005,'2005-11-11','Resigned','Resigned','H. Eight',NULL,5.0,NULL,'tab	here','{"Firm": "F7", "Company": "Eta", "Sector": "Mining", "FY": "2005", "Exit date": "2005-11-11", "Announced": "", "Reason": "Resigned", "CEO": "H. Eight", "Age": "", "Tenure": "5", "Interim": "", "Note": "tab\there"}',NULL,NULL,1);
INSERT INTO "departures" VALUES(8,1,2,'F1',NULL,'Mining',2001,'2001-03-04','Retired','Retired','A. One',61.5,3.99,0,'said "bye"','{"Firm": "F1", "Company": "Alpha, Inc", "Sector": "Mining", "FY": "2001", "Exit date": "2001-03-04", "Announced": "2000-12-01", "Reason": "Retired", "CEO": "A. One", "Age": "61.5", "Tenure": "3.99", "Interim": "no", "Note": "said \"bye\""}','2000-12-01',93,2);
INSERT INTO "departures" VALUES(9,1,3,'F2',NULL,NULL,2001,NULL,'Still in post','Still in post','B. Two',NULL,NULL,NULL,NULL,'{"Firm": "F2", "Company": "Béta Ltd", "Sector": "", "FY": "2001", "Exit date": "", "Announced": "", "Reason": "Still in post", "CEO": "B. Two", "Age": "", "Tenure": "", "Interim": "", "Note": ""}',NULL,NULL,2);
INSERT INTO "departures" VALUES(10,1,4,'F3',NULL,'Retail',2002,'2002-06-30','Dismissed','dismissed ','C. Three',48.0,12.0,1,'note % 1','{"Firm": "F3", "Company": "Gamma", "Sector": "Retail", "FY": "2002", "Exit date": "2002-06-30", "Announced": "2002-06-01", "Reason": "dismissed ", "CEO": "C. Three", "Age": "48", "Tenure": "12", "Interim": "yes", "Note": "note % 1"}','2002-06-01',29,2);
INSERT INTO "departures" VALUES(11,1,5,'F1',NULL,'Mining',2003,'2003-01-15','Dismissed','Dismissed','D. Four',55.25,0.5,NULL,NULL,'{"Firm": "F1", "Company": "Alpha, Inc", "Sector": "Mining", "FY": "2003", "Exit date": "2003-01-15", "Announced": "", "Reason": "Dismissed", "CEO": "D. Four", "Age": "55.25", "Tenure": "0.5", "Interim": "", "Note": ""}',NULL,NULL,2);
INSERT INTO "departures" VALUES(12,1,7,'F5',NULL,'Banks',2004,'2004-09-09','Health','Health','F. Six',66.0,7.25,0,'ünï','{"Firm": "F5", "Company": "Epsilon", "Sector": "Banks", "FY": "2004", "Exit date": "2004-09-09", "Announced": "2004-01-01", "Reason": "Health", "CEO": "F. Six", "Age": "66", "Tenure": "7.25", "Interim": "no", "Note": "ünï"}','2004-01-01',252,2);
INSERT INTO "departures" VALUES(13,1,8,'F8',NULL,'Retail',2006,'2006-02-02','Retired','Retired','I. Nine',64.0,9.0,0,'new','{"Firm": "F8", "Company": "Theta", "Sector": "Retail", "FY": "2006", "Exit date": "2006-02-02", "Announced": "", "Reason": "Retired", "CEO": "I. Nine", "Age": "64", "Tenure": "9", "Interim": "no", "Note": "new"}',NULL,NULL,2);
INSERT INTO "departures" VALUES(14,1,9,'F6',NULL,'Banks',2004,'2004-10-10','Dismissed','Dismissed','G. Seven',59.9,3.0,1,'changed','{"Firm": "F6", "Company": "Zeta", "Sector": "Banks", "FY": "2004", "Exit date": "2004-10-10", "Announced": "", "Reason": "Dismissed", "CEO": "G. Seven", "Age": "59.9", "Tenure": "3", "Interim": "yes", "Note": "changed"}',NULL,NULL,2);
CREATE TABLE intake_profiles (
	id INTEGER NOT NULL PRIMARY KEY AUTOINCREMENT, 
	name VARCHAR NOT NULL, 
	headers TEXT NOT NULL, 
	roles TEXT NOT NULL, 
	header_row INTEGER, 
	date_order VARCHAR NOT NULL, 
	fy_end INTEGER NOT NULL, 
	created_at VARCHAR NOT NULL, 
	updated_at VARCHAR NOT NULL, 
	UNIQUE (name)
);
CREATE TABLE mapping_entries (
	version_id INTEGER NOT NULL, 
	code VARCHAR NOT NULL, 
	category VARCHAR NOT NULL, 
	label VARCHAR NOT NULL, 
	UNIQUE (version_id, code), 
	FOREIGN KEY(version_id) REFERENCES mapping_versions (id) ON DELETE CASCADE
);
CREATE TABLE mapping_overrides (
	version_id INTEGER NOT NULL, 
	position INTEGER NOT NULL, 
	roster_id INTEGER NOT NULL, 
	firm_id VARCHAR NOT NULL, 
	executive VARCHAR, 
	year INTEGER NOT NULL, 
	reason VARCHAR NOT NULL, 
	occurrence INTEGER DEFAULT '0' NOT NULL, 
	departure_id INTEGER, 
	roster_version INTEGER, 
	category VARCHAR NOT NULL, 
	note TEXT NOT NULL, 
	author VARCHAR NOT NULL, 
	created_at VARCHAR NOT NULL, 
	UNIQUE (version_id, position), 
	FOREIGN KEY(version_id) REFERENCES mapping_versions (id) ON DELETE CASCADE
);
CREATE TABLE mapping_rules (
	version_id INTEGER NOT NULL, 
	position INTEGER NOT NULL, 
	code VARCHAR NOT NULL, 
	field VARCHAR NOT NULL, 
	comparison VARCHAR NOT NULL, 
	value INTEGER NOT NULL, 
	category VARCHAR NOT NULL, 
	UNIQUE (version_id, position), 
	FOREIGN KEY(version_id) REFERENCES mapping_versions (id) ON DELETE CASCADE
);
CREATE TABLE mapping_versions (
	id INTEGER NOT NULL PRIMARY KEY AUTOINCREMENT, 
	mapping_id INTEGER NOT NULL, 
	version INTEGER NOT NULL, 
	created_at VARCHAR NOT NULL, 
	author VARCHAR NOT NULL, 
	note TEXT NOT NULL, 
	UNIQUE (mapping_id, version), 
	FOREIGN KEY(mapping_id) REFERENCES mappings (id) ON DELETE CASCADE
);
CREATE TABLE mappings (
	id INTEGER NOT NULL PRIMARY KEY AUTOINCREMENT, 
	name VARCHAR NOT NULL, 
	created_at VARCHAR NOT NULL, 
	UNIQUE (name)
);
CREATE TABLE rejected_rows (
	id INTEGER NOT NULL, 
	roster_id INTEGER NOT NULL, 
	line INTEGER NOT NULL, 
	raw TEXT NOT NULL, 
	reason TEXT NOT NULL, 
	version INTEGER DEFAULT '1' NOT NULL, 
	PRIMARY KEY (id), 
	FOREIGN KEY(roster_id) REFERENCES rosters (id) ON DELETE CASCADE
);
INSERT INTO "rejected_rows" VALUES(1,1,6,'{"Firm": "F4", "Company": "Delta", "Sector": "Retail", "FY": "20x3", "Exit date": "", "Announced": "", "Reason": "Retired", "CEO": "E. Five", "Age": "70", "Tenure": "10", "Interim": "no", "Note": "bad year"}','year ''20x3'' is not a whole number',1);
INSERT INTO "rejected_rows" VALUES(2,1,6,'{"Firm": "F4", "Company": "Delta", "Sector": "Retail", "FY": "20x3", "Exit date": "", "Announced": "", "Reason": "Retired", "CEO": "E. Five", "Age": "70", "Tenure": "10", "Interim": "no", "Note": "bad year"}','year ''20x3'' is not a whole number',2);
CREATE TABLE roster_cells (
	roster_id INTEGER NOT NULL, 
	year INTEGER NOT NULL, 
	sector VARCHAR, 
	reason VARCHAR NOT NULL, 
	departures INTEGER NOT NULL, 
	version INTEGER DEFAULT '1' NOT NULL, 
	FOREIGN KEY(roster_id) REFERENCES rosters (id) ON DELETE CASCADE
);
INSERT INTO "roster_cells" VALUES(1,2001,'Mining','Retired',1,1);
INSERT INTO "roster_cells" VALUES(1,2001,NULL,'Still in post',1,1);
INSERT INTO "roster_cells" VALUES(1,2002,'Retail','dismissed',1,1);
INSERT INTO "roster_cells" VALUES(1,2003,'Mining','dismissed',1,1);
INSERT INTO "roster_cells" VALUES(1,2004,'Banks','Health',1,1);
INSERT INTO "roster_cells" VALUES(1,2004,'Banks','Retired',1,1);
INSERT INTO "roster_cells" VALUES(1,2005,'Mining','Resigned',1,1);
INSERT INTO "roster_cells" VALUES(1,2001,'Mining','Retired',1,2);
INSERT INTO "roster_cells" VALUES(1,2001,NULL,'Still in post',1,2);
INSERT INTO "roster_cells" VALUES(1,2002,'Retail','Dismissed',1,2);
INSERT INTO "roster_cells" VALUES(1,2003,'Mining','Dismissed',1,2);
INSERT INTO "roster_cells" VALUES(1,2004,'Banks','Health',1,2);
INSERT INTO "roster_cells" VALUES(1,2006,'Retail','Retired',1,2);
INSERT INTO "roster_cells" VALUES(1,2004,'Banks','Dismissed',1,2);
CREATE TABLE roster_detail_cells (
	roster_id INTEGER NOT NULL, 
	year INTEGER NOT NULL, 
	sector VARCHAR, 
	reason VARCHAR NOT NULL, 
	age INTEGER, 
	tenure INTEGER, 
	interim BOOLEAN, 
	notice_days INTEGER, 
	departures INTEGER NOT NULL, 
	version INTEGER DEFAULT '1' NOT NULL, 
	FOREIGN KEY(roster_id) REFERENCES rosters (id) ON DELETE CASCADE
);
INSERT INTO "roster_detail_cells" VALUES(1,2001,'Mining','Retired',61,3,0,93,1,1);
INSERT INTO "roster_detail_cells" VALUES(1,2001,NULL,'Still in post',NULL,NULL,NULL,NULL,1,1);
INSERT INTO "roster_detail_cells" VALUES(1,2002,'Retail','dismissed',48,12,1,29,1,1);
INSERT INTO "roster_detail_cells" VALUES(1,2003,'Mining','dismissed',55,0,NULL,NULL,1,1);
INSERT INTO "roster_detail_cells" VALUES(1,2004,'Banks','Health',66,7,0,252,1,1);
INSERT INTO "roster_detail_cells" VALUES(1,2004,'Banks','Retired',59,3,1,NULL,1,1);
INSERT INTO "roster_detail_cells" VALUES(1,2005,'Mining','Resigned',NULL,5,NULL,NULL,1,1);
INSERT INTO "roster_detail_cells" VALUES(1,2001,'Mining','Retired',61,3,0,93,1,2);
INSERT INTO "roster_detail_cells" VALUES(1,2001,NULL,'Still in post',NULL,NULL,NULL,NULL,1,2);
INSERT INTO "roster_detail_cells" VALUES(1,2002,'Retail','Dismissed',48,12,1,29,1,2);
INSERT INTO "roster_detail_cells" VALUES(1,2003,'Mining','Dismissed',55,0,NULL,NULL,1,2);
INSERT INTO "roster_detail_cells" VALUES(1,2004,'Banks','Health',66,7,0,252,1,2);
INSERT INTO "roster_detail_cells" VALUES(1,2006,'Retail','Retired',64,9,0,NULL,1,2);
INSERT INTO "roster_detail_cells" VALUES(1,2004,'Banks','Dismissed',59,3,1,NULL,1,2);
CREATE TABLE roster_firm_cells (
	roster_id INTEGER NOT NULL, 
	firm_id VARCHAR NOT NULL, 
	year INTEGER NOT NULL, 
	sector VARCHAR, 
	reason VARCHAR NOT NULL, 
	age INTEGER, 
	tenure INTEGER, 
	interim BOOLEAN, 
	notice_days INTEGER, 
	departures INTEGER NOT NULL, 
	version INTEGER DEFAULT '1' NOT NULL, 
	FOREIGN KEY(roster_id) REFERENCES rosters (id) ON DELETE CASCADE
);
INSERT INTO "roster_firm_cells" VALUES(1,'F1',2001,'Mining','Retired',61,3,0,93,1,1);
INSERT INTO "roster_firm_cells" VALUES(1,'F2',2001,NULL,'Still in post',NULL,NULL,NULL,NULL,1,1);
INSERT INTO "roster_firm_cells" VALUES(1,'F3',2002,'Retail','dismissed',48,12,1,29,1,1);
INSERT INTO "roster_firm_cells" VALUES(1,'F1',2003,'Mining','dismissed',55,0,NULL,NULL,1,1);
INSERT INTO "roster_firm_cells" VALUES(1,'F5',2004,'Banks','Health',66,7,0,252,1,1);
INSERT INTO "roster_firm_cells" VALUES(1,'F6',2004,'Banks','Retired',59,3,1,NULL,1,1);
INSERT INTO "roster_firm_cells" VALUES(1,'F7',2005,'Mining','Resigned',NULL,5,NULL,NULL,1,1);
INSERT INTO "roster_firm_cells" VALUES(1,'F1',2001,'Mining','Retired',61,3,0,93,1,2);
INSERT INTO "roster_firm_cells" VALUES(1,'F2',2001,NULL,'Still in post',NULL,NULL,NULL,NULL,1,2);
INSERT INTO "roster_firm_cells" VALUES(1,'F3',2002,'Retail','Dismissed',48,12,1,29,1,2);
INSERT INTO "roster_firm_cells" VALUES(1,'F1',2003,'Mining','Dismissed',55,0,NULL,NULL,1,2);
INSERT INTO "roster_firm_cells" VALUES(1,'F5',2004,'Banks','Health',66,7,0,252,1,2);
INSERT INTO "roster_firm_cells" VALUES(1,'F8',2006,'Retail','Retired',64,9,0,NULL,1,2);
INSERT INTO "roster_firm_cells" VALUES(1,'F6',2004,'Banks','Dismissed',59,3,1,NULL,1,2);
CREATE TABLE roster_settings (
	roster_id INTEGER NOT NULL, 
	mapping_name VARCHAR, 
	window_from INTEGER, 
	window_to INTEGER, 
	PRIMARY KEY (roster_id), 
	FOREIGN KEY(roster_id) REFERENCES rosters (id) ON DELETE CASCADE
);
INSERT INTO "roster_settings" VALUES(1,NULL,NULL,NULL);
CREATE TABLE roster_spellings (
	roster_id INTEGER NOT NULL, 
	version INTEGER DEFAULT '1' NOT NULL, 
	reason VARCHAR NOT NULL, 
	spelling VARCHAR NOT NULL, 
	departures INTEGER NOT NULL, 
	FOREIGN KEY(roster_id) REFERENCES rosters (id) ON DELETE CASCADE
);
INSERT INTO "roster_spellings" VALUES(1,1,'Retired','Retired',2);
INSERT INTO "roster_spellings" VALUES(1,1,'Still in post','Still in post',1);
INSERT INTO "roster_spellings" VALUES(1,1,'dismissed','dismissed ',1);
INSERT INTO "roster_spellings" VALUES(1,1,'dismissed','Dismissed',1);
INSERT INTO "roster_spellings" VALUES(1,1,'Health','Health',1);
INSERT INTO "roster_spellings" VALUES(1,1,'Resigned','Resigned',1);
INSERT INTO "roster_spellings" VALUES(1,2,'Retired','Retired',2);
INSERT INTO "roster_spellings" VALUES(1,2,'Still in post','Still in post',1);
INSERT INTO "roster_spellings" VALUES(1,2,'Dismissed','dismissed ',1);
INSERT INTO "roster_spellings" VALUES(1,2,'Dismissed','Dismissed',2);
INSERT INTO "roster_spellings" VALUES(1,2,'Health','Health',1);
CREATE TABLE roster_versions (
	id INTEGER NOT NULL PRIMARY KEY AUTOINCREMENT, 
	roster_id INTEGER NOT NULL, 
	version INTEGER NOT NULL, 
	source_name VARCHAR NOT NULL, 
	sha256 VARCHAR(64) NOT NULL, 
	imported_at VARCHAR NOT NULL, 
	rows_total INTEGER NOT NULL, 
	accepted INTEGER NOT NULL, 
	rejected INTEGER NOT NULL, 
	duplicates INTEGER NOT NULL, 
	columns TEXT NOT NULL, 
	author VARCHAR, 
	UNIQUE (roster_id, version), 
	FOREIGN KEY(roster_id) REFERENCES rosters (id) ON DELETE CASCADE
);
INSERT INTO "roster_versions" VALUES(1,1,1,'desk.csv','20018084b0198ea6ea4a422d717115da1b9cd41e6113067253358b380616b814','2026-12-02T13:39:24+00:00',8,7,1,0,'{"firm_id": "Firm", "sector": "Sector", "year": "FY", "date": "Exit date", "reason": "Reason", "executive": "CEO", "age": "Age", "tenure": "Tenure", "interim": "Interim", "notes": "Note", "announced": "Announced"}','local analyst');
INSERT INTO "roster_versions" VALUES(2,1,2,'desk-2.csv','87f7051a90a08d0084b352fcbb9147e346ba55bc848745ec9c34b70b104e1a42','2026-12-02T13:39:25+00:00',8,7,1,0,'{"firm_id": "Firm", "sector": "Sector", "year": "FY", "date": "Exit date", "reason": "Reason", "executive": "CEO", "age": "Age", "tenure": "Tenure", "interim": "Interim", "notes": "Note", "announced": "Announced"}','local analyst');
CREATE TABLE rosters (
	id INTEGER NOT NULL PRIMARY KEY AUTOINCREMENT, 
	name VARCHAR NOT NULL, 
	source_name VARCHAR NOT NULL, 
	sha256 VARCHAR(64) NOT NULL, 
	imported_at VARCHAR NOT NULL, 
	rows_total INTEGER NOT NULL, 
	accepted INTEGER NOT NULL, 
	rejected INTEGER NOT NULL, 
	duplicates INTEGER NOT NULL, 
	columns TEXT NOT NULL, 
	version INTEGER DEFAULT '1' NOT NULL, 
	UNIQUE (name)
);
INSERT INTO "rosters" VALUES(1,'Desk roster','desk-2.csv','87f7051a90a08d0084b352fcbb9147e346ba55bc848745ec9c34b70b104e1a42','2026-12-02T13:39:25+00:00',8,7,1,0,'{"firm_id": "Firm", "sector": "Sector", "year": "FY", "date": "Exit date", "reason": "Reason", "executive": "CEO", "age": "Age", "tenure": "Tenure", "interim": "Interim", "notes": "Note", "announced": "Announced"}',2);
CREATE TABLE run_replicates (
	run_id INTEGER NOT NULL, 
	seq INTEGER NOT NULL, 
	count INTEGER NOT NULL, 
	data BLOB NOT NULL, 
	failures BLOB NOT NULL, 
	standard_errors BLOB, 
	UNIQUE (run_id, seq), 
	FOREIGN KEY(run_id) REFERENCES runs (id) ON DELETE CASCADE
);
CREATE TABLE runs (
	id INTEGER NOT NULL PRIMARY KEY AUTOINCREMENT, 
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
	author VARCHAR, 
	roster_version INTEGER, 
	claimed_by VARCHAR, 
	heartbeat_at FLOAT
);
CREATE TABLE universe_firm_years (
	universe_id INTEGER NOT NULL, 
	firm_id VARCHAR NOT NULL, 
	year INTEGER NOT NULL, 
	UNIQUE (universe_id, firm_id, year), 
	FOREIGN KEY(universe_id) REFERENCES universes (id) ON DELETE CASCADE
);
CREATE TABLE universe_rejected (
	id INTEGER NOT NULL, 
	universe_id INTEGER NOT NULL, 
	line INTEGER NOT NULL, 
	raw TEXT NOT NULL, 
	reason TEXT NOT NULL, 
	PRIMARY KEY (id), 
	FOREIGN KEY(universe_id) REFERENCES universes (id) ON DELETE CASCADE
);
CREATE TABLE universes (
	id INTEGER NOT NULL, 
	roster_id INTEGER NOT NULL, 
	source VARCHAR NOT NULL, 
	source_name VARCHAR NOT NULL, 
	sha256 VARCHAR(64) NOT NULL, 
	fingerprint VARCHAR NOT NULL, 
	imported_at VARCHAR NOT NULL, 
	shape VARCHAR NOT NULL, 
	rows_total INTEGER NOT NULL, 
	rejected INTEGER NOT NULL, 
	firms INTEGER NOT NULL, 
	firm_years INTEGER NOT NULL, 
	columns TEXT NOT NULL, 
	PRIMARY KEY (id), 
	FOREIGN KEY(roster_id) REFERENCES rosters (id) ON DELETE CASCADE
);
CREATE INDEX ix_rosters_sha256 ON rosters (sha256);
CREATE INDEX ix_runs_roster_id ON runs (roster_id);
CREATE INDEX ix_audit_events_actor ON audit_events (actor);
CREATE INDEX ix_audit_events_at ON audit_events (at);
CREATE INDEX ix_roster_versions_roster_id ON roster_versions (roster_id);
CREATE INDEX ix_roster_versions_sha256 ON roster_versions (sha256);
CREATE INDEX ix_departures_roster_version ON departures (roster_id, version);
CREATE INDEX ix_departures_roster_id ON departures (roster_id);
CREATE INDEX ix_rejected_rows_roster_id ON rejected_rows (roster_id);
CREATE INDEX ix_run_replicates_run_id ON run_replicates (run_id);
CREATE INDEX ix_universes_roster_id ON universes (roster_id);
CREATE INDEX ix_roster_cells_roster_id ON roster_cells (roster_id);
CREATE INDEX ix_roster_detail_cells_roster_id ON roster_detail_cells (roster_id);
CREATE INDEX ix_roster_spellings_roster_id ON roster_spellings (roster_id);
CREATE INDEX ix_roster_firm_cells_roster_id ON roster_firm_cells (roster_id);
CREATE INDEX ix_api_tokens_account_id ON api_tokens (account_id);
CREATE INDEX ix_mapping_entries_version_id ON mapping_entries (version_id);
CREATE INDEX ix_mapping_rules_version_id ON mapping_rules (version_id);
CREATE INDEX ix_mapping_overrides_version_id ON mapping_overrides (version_id);
CREATE INDEX ix_universe_firm_years_universe_id ON universe_firm_years (universe_id);
CREATE INDEX ix_universe_rejected_universe_id ON universe_rejected (universe_id);
DELETE FROM "sqlite_sequence";
INSERT INTO "sqlite_sequence" VALUES('rosters',1);
INSERT INTO "sqlite_sequence" VALUES('audit_events',2);
INSERT INTO "sqlite_sequence" VALUES('roster_versions',2);
COMMIT;
