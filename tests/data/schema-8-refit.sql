BEGIN TRANSACTION;
CREATE TABLE alert_events (
                id INTEGER PRIMARY KEY AUTOINCREMENT,
                alert_id INTEGER NOT NULL REFERENCES alerts (id),
                kind TEXT NOT NULL,
                time REAL NOT NULL,
                actor TEXT NOT NULL,
                note TEXT,
                data_json TEXT
            );
INSERT INTO "alert_events" VALUES(1,1,'opened',1767252601.0,'limitwatch','beyond-limits on x chart, severity warning','{"value": 827.32, "time": 1767252600.0, "index": 45}');
INSERT INTO "alert_events" VALUES(2,1,'notified',1767252601.0,'limitwatch','opened notification queued for default','{"event_id": "1:opened:0", "routes": ["default"]}');
INSERT INTO "alert_events" VALUES(3,1,'reminded',1767256201.0,'limitwatch','reminder notification queued for default','{"event_id": "1:reminder:1", "routes": ["default"]}');
INSERT INTO "alert_events" VALUES(4,1,'reminded',1767259801.0,'limitwatch','reminder notification queued for default','{"event_id": "1:reminder:2", "routes": ["default"]}');
INSERT INTO "alert_events" VALUES(5,1,'reminded',1767263401.0,'limitwatch','reminder notification queued for default','{"event_id": "1:reminder:3", "routes": ["default"]}');
INSERT INTO "alert_events" VALUES(6,1,'cleared',1767266401.0,'limitwatch','10 consecutive readings without a signal from any rule',NULL);
INSERT INTO "alert_events" VALUES(7,1,'notified',1767266401.0,'limitwatch','cleared notification queued for default','{"event_id": "1:cleared:0", "routes": ["default"]}');
CREATE TABLE alerts (
                id INTEGER PRIMARY KEY AUTOINCREMENT,
                stream TEXT NOT NULL,
                rule TEXT NOT NULL,
                state TEXT NOT NULL CHECK (state IN ('open', 'acknowledged', 'cleared')),
                severity TEXT NOT NULL,
                opened_at REAL NOT NULL,
                first_time REAL NOT NULL,
                first_index INTEGER,
                first_value REAL,
                last_time REAL NOT NULL,
                last_index INTEGER,
                last_value REAL,
                signal_count INTEGER NOT NULL DEFAULT 1,
                quiet_count INTEGER NOT NULL DEFAULT 0,
                seen_time REAL NOT NULL,
                signal_json TEXT NOT NULL DEFAULT '{}',
                acknowledged_at REAL,
                acknowledged_by TEXT,
                ack_note TEXT,
                cleared_at REAL,
                notified_at REAL,
                last_notice_at REAL,
                reminders INTEGER NOT NULL DEFAULT 0,
                escalated_at REAL,
                suppressed_until REAL
            , worst_z REAL, silent_since REAL, ack_announced_at REAL, announced_severity TEXT, cleared_announced_at REAL, merged_into INTEGER REFERENCES alerts (id));
INSERT INTO "alerts" VALUES(1,'kiln-3/temp','beyond-limits','cleared','warning',1767252601.0,1767252600.0,45,827.32,1767260400.0,58,827.07,11,10,1767266400.0,'{"chart": "x", "side": "upper", "index": 58, "involved": [58], "center": 820.0784, "sigma": 1.7835316874736655, "ucl": 825.428995062421, "lcl": 814.727804937579, "mr": 1.0600000000000591, "mr_ucl": 6.573895487568273, "baseline_version": 1, "statistic": 3.920087346417441, "limit": 3.0}',NULL,NULL,NULL,1767266401.0,1767252601.0,1767263401.0,3,NULL,NULL,5.21527039038791873082e+00,NULL,NULL,'warning',1767266401.0,NULL);
CREATE TABLE baselines (
                id INTEGER PRIMARY KEY AUTOINCREMENT,
                stream TEXT NOT NULL,
                version INTEGER NOT NULL CHECK (version >= 1),
                created_at REAL NOT NULL,
                created_by TEXT NOT NULL,
                reason TEXT NOT NULL,
                method TEXT NOT NULL,
                first_index INTEGER,
                last_index INTEGER,
                first_time REAL,
                last_time REAL,
                excluded_json TEXT NOT NULL DEFAULT '[]',
                numbers_json TEXT NOT NULL,
                UNIQUE (stream, version)
            );
INSERT INTO "baselines" VALUES(1,'kiln-3/temp',1,1767240001.0,'limitwatch','learned from the stream''s readings 0..24','mean',0,24,1767225600.0,1767240000.0,'[]','{"center": 820.0784, "mr_bar": 2.0124999999999886, "sigma": 1.7835316874736655, "ucl": 825.428995062421, "lcl": 814.727804937579, "mr_ucl": 6.573895487568273, "n": 25, "excluded": [], "cp": null, "cpk": null, "pp": null, "ppk": null, "mr_median": 1.5200000000000387, "method": "mean", "lcl_raw": 814.727804937579, "ucl_raw": 825.428995062421, "lcl_clipped": false, "ucl_clipped": false, "n_used": 25, "exclusions": [], "iterations": 0, "converged": true, "lower_bound": null, "upper_bound": null, "lag1_autocorrelation": -0.17518695184827346, "sigma_overall": 1.6407434290588971, "capability": null, "warnings": []}');
INSERT INTO "baselines" VALUES(2,'dryer-1/moisture',1,1767225601.0,'config','typed into the config','mean',NULL,NULL,NULL,NULL,'[]','{"center": 11.0, "mr_bar": 0.33851375012865376, "sigma": 0.3, "ucl": 11.9, "lcl": 10.1, "mr_ucl": 1.1057659699133333, "n": 0, "excluded": [], "cp": null, "cpk": null, "pp": null, "ppk": null, "mr_median": 0.2861617657226819, "method": "mean", "lcl_raw": 10.1, "ucl_raw": 11.9, "lcl_clipped": false, "ucl_clipped": false, "n_used": 0, "exclusions": [], "iterations": 0, "converged": true, "lower_bound": null, "upper_bound": null, "lag1_autocorrelation": null, "sigma_overall": null, "capability": null, "warnings": []}');
INSERT INTO "baselines" VALUES(3,'kiln-3/temp',2,1.79623968913750195509e+09,'ana','new burner nozzle','mean',45,59,1767252600.0,1767261000.0,'[]','{"center": 826.5846666666666, "mr_bar": 1.995000000000029, "sigma": 1.768022716278278, "ucl": 831.8887348155015, "lcl": 821.2805985178318, "mr_ucl": 6.516731178980854, "n": 15, "excluded": [], "cp": null, "cpk": null, "pp": null, "ppk": null, "mr_median": 1.5199999999999818, "method": "mean", "lcl_raw": 821.2805985178318, "ucl_raw": 831.8887348155015, "lcl_clipped": false, "ucl_clipped": false, "n_used": 15, "exclusions": [], "iterations": 0, "converged": true, "lower_bound": null, "upper_bound": null, "lag1_autocorrelation": -0.2107316339914184, "sigma_overall": 1.6169630557961288, "capability": null, "warnings": ["limits from fewer than 20 points are provisional (common practice): this baseline uses 15; refit when more readings are in"]}');
CREATE TABLE checkpoints (
                stream TEXT PRIMARY KEY,
                saved_at REAL NOT NULL,
                state_json TEXT NOT NULL
            );
INSERT INTO "checkpoints" VALUES('kiln-3/temp',1767270600.0,'{"format": 2, "stream": "kiln-3/temp", "count": 75, "last_time": 1767270000.0, "last_value": 826.87, "last_seq": null, "learning": [], "baseline": {"center": 826.5846666666666, "mr_bar": 1.995000000000029, "sigma": 1.768022716278278, "ucl": 831.8887348155015, "lcl": 821.2805985178318, "mr_ucl": 6.516731178980854, "n": 15, "excluded": [], "cp": null, "cpk": null, "pp": null, "ppk": null, "mr_median": 1.5199999999999818, "method": "mean", "lcl_raw": 821.2805985178318, "ucl_raw": 831.8887348155015, "lcl_clipped": false, "ucl_clipped": false, "n_used": 15, "exclusions": [], "iterations": 0, "converged": true, "lower_bound": null, "upper_bound": null, "lag1_autocorrelation": -0.2107316339914184, "sigma_overall": 1.6169630557961288, "capability": null, "warnings": ["limits from fewer than 20 points are provisional (common practice): this baseline uses 15; refit when more readings are in"]}, "baseline_version": 2, "rules": "beyond-limits(k=3.0), mr-beyond-limit(limit=3.6858865663777776)", "states": [[], []]}');
INSERT INTO "checkpoints" VALUES('dryer-1/moisture',1767252601.0,'{"format": 2, "stream": "dryer-1/moisture", "count": 20, "last_time": 1767237000.0, "last_value": 10.74, "last_seq": null, "learning": [], "baseline": {"center": 11.0, "mr_bar": 0.33851375012865376, "sigma": 0.3, "ucl": 11.9, "lcl": 10.1, "mr_ucl": 1.1057659699133333, "n": 0, "excluded": [], "cp": null, "cpk": null, "pp": null, "ppk": null, "mr_median": 0.2861617657226819, "method": "mean", "lcl_raw": 10.1, "ucl_raw": 11.9, "lcl_clipped": false, "ucl_clipped": false, "n_used": 0, "exclusions": [], "iterations": 0, "converged": true, "lower_bound": null, "upper_bound": null, "lag1_autocorrelation": null, "sigma_overall": null, "capability": null, "warnings": []}, "baseline_version": 1, "rules": "beyond-limits(k=3.0), mr-beyond-limit(limit=3.6858865663777776)", "states": [[], []]}');
CREATE TABLE dead_letters (
                id INTEGER PRIMARY KEY AUTOINCREMENT,
                source TEXT NOT NULL,
                received_at REAL NOT NULL,
                reason TEXT NOT NULL,
                payload BLOB
            , payload_size INTEGER, payload_sha256 TEXT);
CREATE TABLE file_offsets (
                source TEXT NOT NULL,
                file_id TEXT NOT NULL,
                byte_offset INTEGER NOT NULL CHECK (byte_offset >= 0),
                updated_at REAL NOT NULL,
                PRIMARY KEY (source, file_id)
            );
CREATE TABLE floods (
                id INTEGER PRIMARY KEY,
                started_at REAL NOT NULL,
                ended_at REAL,
                changes INTEGER NOT NULL,
                streams_json TEXT NOT NULL DEFAULT '[]'
            );
CREATE TABLE incident_rules (
                alert_id INTEGER NOT NULL REFERENCES alerts (id),
                rule TEXT NOT NULL,
                severity TEXT NOT NULL,
                signal_count INTEGER NOT NULL,
                first_time REAL NOT NULL,
                first_index INTEGER,
                first_value REAL,
                last_time REAL NOT NULL,
                last_index INTEGER,
                last_value REAL,
                signal_json TEXT NOT NULL DEFAULT '{}',
                PRIMARY KEY (alert_id, rule)
            );
INSERT INTO "incident_rules" VALUES(1,'beyond-limits','warning',11,1767252600.0,45,827.32,1767260400.0,58,827.07,'{"chart": "x", "side": "upper", "index": 58, "involved": [58], "center": 820.0784, "sigma": 1.7835316874736655, "ucl": 825.428995062421, "lcl": 814.727804937579, "mr": 1.0600000000000591, "mr_ucl": 6.573895487568273, "baseline_version": 1, "statistic": 3.920087346417441, "limit": 3.0}');
CREATE TABLE outbox (
                id INTEGER PRIMARY KEY AUTOINCREMENT,
                idempotency_key TEXT NOT NULL UNIQUE,
                alert_id INTEGER REFERENCES alerts (id),
                route TEXT NOT NULL,
                payload_json TEXT NOT NULL,
                created_at REAL NOT NULL,
                next_attempt_at REAL NOT NULL,
                attempts INTEGER NOT NULL DEFAULT 0,
                last_error TEXT,
                delivered_at REAL,
                expires_at REAL
            );
INSERT INTO "outbox" VALUES(1,'1:opened:0:default',1,'default','{"schema": "limitwatch.notification/1", "event_id": "1:opened:0", "kind": "opened", "number": 0, "incident_id": 1, "alert_id": 1, "state": "open", "stream": "kiln-3/temp", "description": null, "unit": null, "rule": "beyond-limits", "rule_words": "A reading fell outside the natural process limits (more than three sigma from the center line).", "rules": [{"rule": "beyond-limits", "severity": "warning", "count": 1, "first_time": 1767252600.0, "first_time_iso": "2026-01-01T07:30:00Z", "last_time": 1767252600.0, "last_time_iso": "2026-01-01T07:30:00Z", "words": "A reading fell outside the natural process limits (more than three sigma from the center line)."}], "severity": "warning", "value": 827.32, "time": 1767252600.0, "time_iso": "2026-01-01T07:30:00Z", "first_time": 1767252600.0, "first_time_iso": "2026-01-01T07:30:00Z", "opened_at": 1767252601.0, "opened_at_iso": "2026-01-01T07:30:01Z", "worst_zone": null, "chart": "x", "side": "upper", "center": 820.0784, "sigma": 1.7835316874736655, "ucl": 825.428995062421, "lcl": 814.727804937579, "mr": 6.360000000000014, "mr_ucl": 6.573895487568273, "statistic": 4.060258671522474, "limit": 3.0, "baseline_version": 1, "signal_count": 1, "silent_since": null, "silent_since_iso": null, "acknowledged_at": null, "acknowledged_at_iso": null, "acknowledged_by": null, "ack_note": null, "cleared_at": null, "cleared_at_iso": null, "lasted_s": null, "cleared_through": null, "created_at": 1767252601.0, "created_at_iso": "2026-01-01T07:30:01Z", "commands": {"acknowledge": "limitwatch ack 1", "chart": "limitwatch chart kiln-3/temp", "log": "limitwatch log 1"}, "caution": "limitwatch is a monitoring aid, not a safety system: it does not replace interlocks, alarms required by local codes, or the judgement of qualified staff.", "text": "New warning incident 1 on kiln-3/temp. Stream: kiln-3/temp. A reading fell outside the natural process limits (more than three sigma from the center line). Reading: 827.3 at 2026-01-01T07:30:00Z. Limits: 814.7 to 825.4 (natural process limits), center line 820.1. Since: 2026-01-01T07:30:00Z. Acknowledge: limitwatch ack 1 --note \"what you are doing\". Chart: limitwatch chart kiln-3/temp. limitwatch is a monitoring aid, not a safety system: it does not replace interlocks, alarms required by local codes, or the judgement of qualified staff.", "recent": {"index": [0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15, 16, 17, 18, 19, 20, 21, 22, 23, 24, 25, 26, 27, 28, 29, 30, 31, 32, 33, 34, 35, 36, 37, 38, 39, 40, 41, 42, 43, 44, 45], "time": [1767225600.0, 1767226200.0, 1767226800.0, 1767227400.0, 1767228000.0, 1767228600.0, 1767229200.0, 1767229800.0, 1767230400.0, 1767231000.0, 1767231600.0, 1767232200.0, 1767232800.0, 1767233400.0, 1767234000.0, 1767234600.0, 1767235200.0, 1767235800.0, 1767236400.0, 1767237000.0, 1767237600.0, 1767238200.0, 1767238800.0, 1767239400.0, 1767240000.0, 1767240600.0, 1767241200.0, 1767241800.0, 1767242400.0, 1767243000.0, 1767243600.0, 1767244200.0, 1767244800.0, 1767245400.0, 1767246000.0, 1767246600.0, 1767247200.0, 1767247800.0, 1767248400.0, 1767249000.0, 1767249600.0, 1767250200.0, 1767250800.0, 1767251400.0, 1767252000.0, 1767252600.0], "value": [822.37, 821.77, 820.47, 819.42, 819.57, 815.82, 820.38, 819.16, 820.6, 820.68, 822.28, 819.35, 820.59, 822.81, 819.0, 820.09, 820.12, 817.74, 820.66, 817.98, 822.42, 817.74, 820.45, 819.84, 820.65, 820.83, 818.46, 820.73, 818.95, 821.15, 817.94, 818.7, 819.9, 821.26, 819.46, 819.77, 822.37, 821.23, 819.97, 819.02, 818.93, 819.22, 818.59, 820.58, 820.96, 827.32], "mr": [null, 0.6000000000000227, 1.2999999999999545, 1.0500000000000682, 0.15000000000009095, 3.75, 4.559999999999945, 1.2200000000000273, 1.4400000000000546, 0.07999999999992724, 1.6000000000000227, 2.92999999999995, 1.240000000000009, 2.2199999999999136, 3.8099999999999454, 1.0900000000000318, 0.029999999999972715, 2.3799999999999955, 2.919999999999959, 2.67999999999995, 4.439999999999941, 4.67999999999995, 2.7100000000000364, 0.6100000000000136, 0.8099999999999454, 0.18000000000006366, 2.3700000000000045, 2.269999999999982, 1.7799999999999727, 2.199999999999932, 3.2099999999999227, 0.7599999999999909, 1.1999999999999318, 1.3600000000000136, 1.7999999999999545, 0.30999999999994543, 2.6000000000000227, 1.1399999999999864, 1.259999999999991, 0.9500000000000455, 0.09000000000003183, 0.2900000000000773, 0.6299999999999955, 1.990000000000009, 0.37999999999999545, 6.360000000000014], "learning": [true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false], "signals": [[], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], ["beyond-limits"]]}}',1767252601.0,1767252601.0,0,NULL,NULL,1767339001.0);
INSERT INTO "outbox" VALUES(2,'1:reminder:1:default',1,'default','{"schema": "limitwatch.notification/1", "event_id": "1:reminder:1", "kind": "reminder", "number": 1, "incident_id": 1, "alert_id": 1, "state": "open", "stream": "kiln-3/temp", "description": null, "unit": null, "rule": "beyond-limits", "rule_words": "A reading fell outside the natural process limits (more than three sigma from the center line).", "rules": [{"rule": "beyond-limits", "severity": "warning", "count": 4, "first_time": 1767252600.0, "first_time_iso": "2026-01-01T07:30:00Z", "last_time": 1767255600.0, "last_time_iso": "2026-01-01T08:20:00Z", "words": "A reading fell outside the natural process limits (more than three sigma from the center line)."}], "severity": "warning", "value": 827.86, "time": 1767255600.0, "time_iso": "2026-01-01T08:20:00Z", "first_time": 1767252600.0, "first_time_iso": "2026-01-01T07:30:00Z", "opened_at": 1767252601.0, "opened_at_iso": "2026-01-01T07:30:01Z", "worst_zone": "beyond", "chart": "x", "side": "upper", "center": 820.0784, "sigma": 1.7835316874736655, "ucl": 825.428995062421, "lcl": 814.727804937579, "mr": 1.5199999999999818, "mr_ucl": 6.573895487568273, "statistic": 4.363028733749326, "limit": 3.0, "baseline_version": 1, "signal_count": 4, "silent_since": null, "silent_since_iso": null, "acknowledged_at": null, "acknowledged_at_iso": null, "acknowledged_by": null, "ack_note": null, "cleared_at": null, "cleared_at_iso": null, "lasted_s": null, "cleared_through": null, "created_at": 1767256201.0, "created_at_iso": "2026-01-01T08:30:01Z", "commands": {"acknowledge": "limitwatch ack 1", "chart": "limitwatch chart kiln-3/temp", "log": "limitwatch log 1"}, "caution": "limitwatch is a monitoring aid, not a safety system: it does not replace interlocks, alarms required by local codes, or the judgement of qualified staff.", "text": "Reminder 1: warning incident 1 on kiln-3/temp is not acknowledged. Stream: kiln-3/temp. A reading fell outside the natural process limits (more than three sigma from the center line). Reading: 827.9 at 2026-01-01T08:20:00Z. Limits: 814.7 to 825.4 (natural process limits), center line 820.1. Worst: beyond the natural process limits. Since: 2026-01-01T07:30:00Z, 4 signals. Acknowledge: limitwatch ack 1 --note \"what you are doing\". Chart: limitwatch chart kiln-3/temp. limitwatch is a monitoring aid, not a safety system: it does not replace interlocks, alarms required by local codes, or the judgement of qualified staff.", "recent": {"index": [0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15, 16, 17, 18, 19, 20, 21, 22, 23, 24, 25, 26, 27, 28, 29, 30, 31, 32, 33, 34, 35, 36, 37, 38, 39, 40, 41, 42, 43, 44, 45, 46, 47, 48, 49, 50], "time": [1767225600.0, 1767226200.0, 1767226800.0, 1767227400.0, 1767228000.0, 1767228600.0, 1767229200.0, 1767229800.0, 1767230400.0, 1767231000.0, 1767231600.0, 1767232200.0, 1767232800.0, 1767233400.0, 1767234000.0, 1767234600.0, 1767235200.0, 1767235800.0, 1767236400.0, 1767237000.0, 1767237600.0, 1767238200.0, 1767238800.0, 1767239400.0, 1767240000.0, 1767240600.0, 1767241200.0, 1767241800.0, 1767242400.0, 1767243000.0, 1767243600.0, 1767244200.0, 1767244800.0, 1767245400.0, 1767246000.0, 1767246600.0, 1767247200.0, 1767247800.0, 1767248400.0, 1767249000.0, 1767249600.0, 1767250200.0, 1767250800.0, 1767251400.0, 1767252000.0, 1767252600.0, 1767253200.0, 1767253800.0, 1767254400.0, 1767255000.0, 1767255600.0], "value": [822.37, 821.77, 820.47, 819.42, 819.57, 815.82, 820.38, 819.16, 820.6, 820.68, 822.28, 819.35, 820.59, 822.81, 819.0, 820.09, 820.12, 817.74, 820.66, 817.98, 822.42, 817.74, 820.45, 819.84, 820.65, 820.83, 818.46, 820.73, 818.95, 821.15, 817.94, 818.7, 819.9, 821.26, 819.46, 819.77, 822.37, 821.23, 819.97, 819.02, 818.93, 819.22, 818.59, 820.58, 820.96, 827.32, 824.33, 825.85, 825.06, 829.38, 827.86], "mr": [null, 0.6000000000000227, 1.2999999999999545, 1.0500000000000682, 0.15000000000009095, 3.75, 4.559999999999945, 1.2200000000000273, 1.4400000000000546, 0.07999999999992724, 1.6000000000000227, 2.92999999999995, 1.240000000000009, 2.2199999999999136, 3.8099999999999454, 1.0900000000000318, 0.029999999999972715, 2.3799999999999955, 2.919999999999959, 2.67999999999995, 4.439999999999941, 4.67999999999995, 2.7100000000000364, 0.6100000000000136, 0.8099999999999454, 0.18000000000006366, 2.3700000000000045, 2.269999999999982, 1.7799999999999727, 2.199999999999932, 3.2099999999999227, 0.7599999999999909, 1.1999999999999318, 1.3600000000000136, 1.7999999999999545, 0.30999999999994543, 2.6000000000000227, 1.1399999999999864, 1.259999999999991, 0.9500000000000455, 0.09000000000003183, 0.2900000000000773, 0.6299999999999955, 1.990000000000009, 0.37999999999999545, 6.360000000000014, 2.990000000000009, 1.5199999999999818, 0.7900000000000773, 4.32000000000005, 1.5199999999999818], "learning": [true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false], "signals": [[], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], ["beyond-limits"], [], ["beyond-limits"], [], ["beyond-limits"], ["beyond-limits"]]}}',1767256201.0,1767256201.0,0,NULL,NULL,1767342601.0);
INSERT INTO "outbox" VALUES(3,'1:reminder:2:default',1,'default','{"schema": "limitwatch.notification/1", "event_id": "1:reminder:2", "kind": "reminder", "number": 2, "incident_id": 1, "alert_id": 1, "state": "open", "stream": "kiln-3/temp", "description": null, "unit": null, "rule": "beyond-limits", "rule_words": "A reading fell outside the natural process limits (more than three sigma from the center line).", "rules": [{"rule": "beyond-limits", "severity": "warning", "count": 9, "first_time": 1767252600.0, "first_time_iso": "2026-01-01T07:30:00Z", "last_time": 1767259200.0, "last_time_iso": "2026-01-01T09:20:00Z", "words": "A reading fell outside the natural process limits (more than three sigma from the center line)."}], "severity": "warning", "value": 827.78, "time": 1767259200.0, "time_iso": "2026-01-01T09:20:00Z", "first_time": 1767252600.0, "first_time_iso": "2026-01-01T07:30:00Z", "opened_at": 1767252601.0, "opened_at_iso": "2026-01-01T07:30:01Z", "worst_zone": "beyond", "chart": "x", "side": "upper", "center": 820.0784, "sigma": 1.7835316874736655, "ucl": 825.428995062421, "lcl": 814.727804937579, "mr": 0.08999999999991815, "mr_ucl": 6.573895487568273, "statistic": 4.318173909715693, "limit": 3.0, "baseline_version": 1, "signal_count": 9, "silent_since": null, "silent_since_iso": null, "acknowledged_at": null, "acknowledged_at_iso": null, "acknowledged_by": null, "ack_note": null, "cleared_at": null, "cleared_at_iso": null, "lasted_s": null, "cleared_through": null, "created_at": 1767259801.0, "created_at_iso": "2026-01-01T09:30:01Z", "commands": {"acknowledge": "limitwatch ack 1", "chart": "limitwatch chart kiln-3/temp", "log": "limitwatch log 1"}, "caution": "limitwatch is a monitoring aid, not a safety system: it does not replace interlocks, alarms required by local codes, or the judgement of qualified staff.", "text": "Reminder 2: warning incident 1 on kiln-3/temp is not acknowledged. Stream: kiln-3/temp. A reading fell outside the natural process limits (more than three sigma from the center line). Reading: 827.8 at 2026-01-01T09:20:00Z. Limits: 814.7 to 825.4 (natural process limits), center line 820.1. Worst: beyond the natural process limits. Since: 2026-01-01T07:30:00Z, 9 signals. Acknowledge: limitwatch ack 1 --note \"what you are doing\". Chart: limitwatch chart kiln-3/temp. limitwatch is a monitoring aid, not a safety system: it does not replace interlocks, alarms required by local codes, or the judgement of qualified staff.", "recent": {"index": [0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15, 16, 17, 18, 19, 20, 21, 22, 23, 24, 25, 26, 27, 28, 29, 30, 31, 32, 33, 34, 35, 36, 37, 38, 39, 40, 41, 42, 43, 44, 45, 46, 47, 48, 49, 50, 51, 52, 53, 54, 55, 56], "time": [1767225600.0, 1767226200.0, 1767226800.0, 1767227400.0, 1767228000.0, 1767228600.0, 1767229200.0, 1767229800.0, 1767230400.0, 1767231000.0, 1767231600.0, 1767232200.0, 1767232800.0, 1767233400.0, 1767234000.0, 1767234600.0, 1767235200.0, 1767235800.0, 1767236400.0, 1767237000.0, 1767237600.0, 1767238200.0, 1767238800.0, 1767239400.0, 1767240000.0, 1767240600.0, 1767241200.0, 1767241800.0, 1767242400.0, 1767243000.0, 1767243600.0, 1767244200.0, 1767244800.0, 1767245400.0, 1767246000.0, 1767246600.0, 1767247200.0, 1767247800.0, 1767248400.0, 1767249000.0, 1767249600.0, 1767250200.0, 1767250800.0, 1767251400.0, 1767252000.0, 1767252600.0, 1767253200.0, 1767253800.0, 1767254400.0, 1767255000.0, 1767255600.0, 1767256200.0, 1767256800.0, 1767257400.0, 1767258000.0, 1767258600.0, 1767259200.0], "value": [822.37, 821.77, 820.47, 819.42, 819.57, 815.82, 820.38, 819.16, 820.6, 820.68, 822.28, 819.35, 820.59, 822.81, 819.0, 820.09, 820.12, 817.74, 820.66, 817.98, 822.42, 817.74, 820.45, 819.84, 820.65, 820.83, 818.46, 820.73, 818.95, 821.15, 817.94, 818.7, 819.9, 821.26, 819.46, 819.77, 822.37, 821.23, 819.97, 819.02, 818.93, 819.22, 818.59, 820.58, 820.96, 827.32, 824.33, 825.85, 825.06, 829.38, 827.86, 823.26, 827.95, 827.5, 826.42, 827.69, 827.78], "mr": [null, 0.6000000000000227, 1.2999999999999545, 1.0500000000000682, 0.15000000000009095, 3.75, 4.559999999999945, 1.2200000000000273, 1.4400000000000546, 0.07999999999992724, 1.6000000000000227, 2.92999999999995, 1.240000000000009, 2.2199999999999136, 3.8099999999999454, 1.0900000000000318, 0.029999999999972715, 2.3799999999999955, 2.919999999999959, 2.67999999999995, 4.439999999999941, 4.67999999999995, 2.7100000000000364, 0.6100000000000136, 0.8099999999999454, 0.18000000000006366, 2.3700000000000045, 2.269999999999982, 1.7799999999999727, 2.199999999999932, 3.2099999999999227, 0.7599999999999909, 1.1999999999999318, 1.3600000000000136, 1.7999999999999545, 0.30999999999994543, 2.6000000000000227, 1.1399999999999864, 1.259999999999991, 0.9500000000000455, 0.09000000000003183, 0.2900000000000773, 0.6299999999999955, 1.990000000000009, 0.37999999999999545, 6.360000000000014, 2.990000000000009, 1.5199999999999818, 0.7900000000000773, 4.32000000000005, 1.5199999999999818, 4.600000000000023, 4.690000000000055, 0.4500000000000455, 1.080000000000041, 1.2700000000000955, 0.08999999999991815], "learning": [true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false], "signals": [[], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], ["beyond-limits"], [], ["beyond-limits"], [], ["beyond-limits"], ["beyond-limits"], [], ["beyond-limits"], ["beyond-limits"], ["beyond-limits"], ["beyond-limits"], ["beyond-limits"]]}}',1767259801.0,1767259801.0,0,NULL,NULL,1767346201.0);
INSERT INTO "outbox" VALUES(4,'1:reminder:3:default',1,'default','{"schema": "limitwatch.notification/1", "event_id": "1:reminder:3", "kind": "reminder", "number": 3, "incident_id": 1, "alert_id": 1, "state": "open", "stream": "kiln-3/temp", "description": null, "unit": null, "rule": "beyond-limits", "rule_words": "A reading fell outside the natural process limits (more than three sigma from the center line).", "rules": [{"rule": "beyond-limits", "severity": "warning", "count": 11, "first_time": 1767252600.0, "first_time_iso": "2026-01-01T07:30:00Z", "last_time": 1767260400.0, "last_time_iso": "2026-01-01T09:40:00Z", "words": "A reading fell outside the natural process limits (more than three sigma from the center line)."}], "severity": "warning", "value": 827.07, "time": 1767260400.0, "time_iso": "2026-01-01T09:40:00Z", "first_time": 1767252600.0, "first_time_iso": "2026-01-01T07:30:00Z", "opened_at": 1767252601.0, "opened_at_iso": "2026-01-01T07:30:01Z", "worst_zone": "beyond", "chart": "x", "side": "upper", "center": 820.0784, "sigma": 1.7835316874736655, "ucl": 825.428995062421, "lcl": 814.727804937579, "mr": 1.0600000000000591, "mr_ucl": 6.573895487568273, "statistic": 3.920087346417441, "limit": 3.0, "baseline_version": 1, "signal_count": 11, "silent_since": null, "silent_since_iso": null, "acknowledged_at": null, "acknowledged_at_iso": null, "acknowledged_by": null, "ack_note": null, "cleared_at": null, "cleared_at_iso": null, "lasted_s": null, "cleared_through": null, "created_at": 1767263401.0, "created_at_iso": "2026-01-01T10:30:01Z", "commands": {"acknowledge": "limitwatch ack 1", "chart": "limitwatch chart kiln-3/temp", "log": "limitwatch log 1"}, "caution": "limitwatch is a monitoring aid, not a safety system: it does not replace interlocks, alarms required by local codes, or the judgement of qualified staff.", "text": "Reminder 3: warning incident 1 on kiln-3/temp is not acknowledged. Stream: kiln-3/temp. A reading fell outside the natural process limits (more than three sigma from the center line). Reading: 827.1 at 2026-01-01T09:40:00Z. Limits: 814.7 to 825.4 (natural process limits), center line 820.1. Worst: beyond the natural process limits. Since: 2026-01-01T07:30:00Z, 11 signals. Acknowledge: limitwatch ack 1 --note \"what you are doing\". Chart: limitwatch chart kiln-3/temp. limitwatch is a monitoring aid, not a safety system: it does not replace interlocks, alarms required by local codes, or the judgement of qualified staff.", "recent": {"index": [4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15, 16, 17, 18, 19, 20, 21, 22, 23, 24, 25, 26, 27, 28, 29, 30, 31, 32, 33, 34, 35, 36, 37, 38, 39, 40, 41, 42, 43, 44, 45, 46, 47, 48, 49, 50, 51, 52, 53, 54, 55, 56, 57, 58], "time": [1767228000.0, 1767228600.0, 1767229200.0, 1767229800.0, 1767230400.0, 1767231000.0, 1767231600.0, 1767232200.0, 1767232800.0, 1767233400.0, 1767234000.0, 1767234600.0, 1767235200.0, 1767235800.0, 1767236400.0, 1767237000.0, 1767237600.0, 1767238200.0, 1767238800.0, 1767239400.0, 1767240000.0, 1767240600.0, 1767241200.0, 1767241800.0, 1767242400.0, 1767243000.0, 1767243600.0, 1767244200.0, 1767244800.0, 1767245400.0, 1767246000.0, 1767246600.0, 1767247200.0, 1767247800.0, 1767248400.0, 1767249000.0, 1767249600.0, 1767250200.0, 1767250800.0, 1767251400.0, 1767252000.0, 1767252600.0, 1767253200.0, 1767253800.0, 1767254400.0, 1767255000.0, 1767255600.0, 1767256200.0, 1767256800.0, 1767257400.0, 1767258000.0, 1767258600.0, 1767259200.0, 1767259800.0, 1767260400.0], "value": [819.57, 815.82, 820.38, 819.16, 820.6, 820.68, 822.28, 819.35, 820.59, 822.81, 819.0, 820.09, 820.12, 817.74, 820.66, 817.98, 822.42, 817.74, 820.45, 819.84, 820.65, 820.83, 818.46, 820.73, 818.95, 821.15, 817.94, 818.7, 819.9, 821.26, 819.46, 819.77, 822.37, 821.23, 819.97, 819.02, 818.93, 819.22, 818.59, 820.58, 820.96, 827.32, 824.33, 825.85, 825.06, 829.38, 827.86, 823.26, 827.95, 827.5, 826.42, 827.69, 827.78, 826.01, 827.07], "mr": [0.15000000000009095, 3.75, 4.559999999999945, 1.2200000000000273, 1.4400000000000546, 0.07999999999992724, 1.6000000000000227, 2.92999999999995, 1.240000000000009, 2.2199999999999136, 3.8099999999999454, 1.0900000000000318, 0.029999999999972715, 2.3799999999999955, 2.919999999999959, 2.67999999999995, 4.439999999999941, 4.67999999999995, 2.7100000000000364, 0.6100000000000136, 0.8099999999999454, 0.18000000000006366, 2.3700000000000045, 2.269999999999982, 1.7799999999999727, 2.199999999999932, 3.2099999999999227, 0.7599999999999909, 1.1999999999999318, 1.3600000000000136, 1.7999999999999545, 0.30999999999994543, 2.6000000000000227, 1.1399999999999864, 1.259999999999991, 0.9500000000000455, 0.09000000000003183, 0.2900000000000773, 0.6299999999999955, 1.990000000000009, 0.37999999999999545, 6.360000000000014, 2.990000000000009, 1.5199999999999818, 0.7900000000000773, 4.32000000000005, 1.5199999999999818, 4.600000000000023, 4.690000000000055, 0.4500000000000455, 1.080000000000041, 1.2700000000000955, 0.08999999999991815, 1.7699999999999818, 1.0600000000000591], "learning": [true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false], "signals": [[], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], ["beyond-limits"], [], ["beyond-limits"], [], ["beyond-limits"], ["beyond-limits"], [], ["beyond-limits"], ["beyond-limits"], ["beyond-limits"], ["beyond-limits"], ["beyond-limits"], ["beyond-limits"], ["beyond-limits"]]}}',1767263401.0,1767263401.0,0,NULL,NULL,1767349801.0);
INSERT INTO "outbox" VALUES(5,'1:cleared:0:default',1,'default','{"schema": "limitwatch.notification/1", "event_id": "1:cleared:0", "kind": "cleared", "number": 0, "incident_id": 1, "alert_id": 1, "state": "cleared", "stream": "kiln-3/temp", "description": null, "unit": null, "rule": "beyond-limits", "rule_words": "A reading fell outside the natural process limits (more than three sigma from the center line).", "rules": [{"rule": "beyond-limits", "severity": "warning", "count": 11, "first_time": 1767252600.0, "first_time_iso": "2026-01-01T07:30:00Z", "last_time": 1767260400.0, "last_time_iso": "2026-01-01T09:40:00Z", "words": "A reading fell outside the natural process limits (more than three sigma from the center line)."}], "severity": "warning", "value": 827.07, "time": 1767260400.0, "time_iso": "2026-01-01T09:40:00Z", "first_time": 1767252600.0, "first_time_iso": "2026-01-01T07:30:00Z", "opened_at": 1767252601.0, "opened_at_iso": "2026-01-01T07:30:01Z", "worst_zone": "beyond", "chart": "x", "side": "upper", "center": 820.0784, "sigma": 1.7835316874736655, "ucl": 825.428995062421, "lcl": 814.727804937579, "mr": 1.0600000000000591, "mr_ucl": 6.573895487568273, "statistic": 3.920087346417441, "limit": 3.0, "baseline_version": 1, "signal_count": 11, "silent_since": null, "silent_since_iso": null, "acknowledged_at": null, "acknowledged_at_iso": null, "acknowledged_by": null, "ack_note": null, "cleared_at": 1767266401.0, "cleared_at_iso": "2026-01-01T11:20:01Z", "lasted_s": 13800.0, "cleared_through": 1767266400.0, "created_at": 1767266401.0, "created_at_iso": "2026-01-01T11:20:01Z", "commands": {"acknowledge": "limitwatch ack 1", "chart": "limitwatch chart kiln-3/temp", "log": "limitwatch log 1"}, "caution": "limitwatch is a monitoring aid, not a safety system: it does not replace interlocks, alarms required by local codes, or the judgement of qualified staff.", "text": "Incident 1 on kiln-3/temp is over. Stream: kiln-3/temp. Cleared: at 2026-01-01T11:20:01Z; it lasted 3h50m. A reading fell outside the natural process limits (more than three sigma from the center line). Reading: 827.1 at 2026-01-01T09:40:00Z. Limits: 814.7 to 825.4 (natural process limits), center line 820.1. Worst: beyond the natural process limits. Since: 2026-01-01T07:30:00Z, 11 signals. Chart: limitwatch chart kiln-3/temp. limitwatch is a monitoring aid, not a safety system: it does not replace interlocks, alarms required by local codes, or the judgement of qualified staff.", "recent": {"index": [9, 10, 11, 12, 13, 14, 15, 16, 17, 18, 19, 20, 21, 22, 23, 24, 25, 26, 27, 28, 29, 30, 31, 32, 33, 34, 35, 36, 37, 38, 39, 40, 41, 42, 43, 44, 45, 46, 47, 48, 49, 50, 51, 52, 53, 54, 55, 56, 57, 58, 59, 60, 61, 62, 63, 64, 65, 66, 67, 68], "time": [1767231000.0, 1767231600.0, 1767232200.0, 1767232800.0, 1767233400.0, 1767234000.0, 1767234600.0, 1767235200.0, 1767235800.0, 1767236400.0, 1767237000.0, 1767237600.0, 1767238200.0, 1767238800.0, 1767239400.0, 1767240000.0, 1767240600.0, 1767241200.0, 1767241800.0, 1767242400.0, 1767243000.0, 1767243600.0, 1767244200.0, 1767244800.0, 1767245400.0, 1767246000.0, 1767246600.0, 1767247200.0, 1767247800.0, 1767248400.0, 1767249000.0, 1767249600.0, 1767250200.0, 1767250800.0, 1767251400.0, 1767252000.0, 1767252600.0, 1767253200.0, 1767253800.0, 1767254400.0, 1767255000.0, 1767255600.0, 1767256200.0, 1767256800.0, 1767257400.0, 1767258000.0, 1767258600.0, 1767259200.0, 1767259800.0, 1767260400.0, 1767261000.0, 1767261600.0, 1767262200.0, 1767262800.0, 1767263400.0, 1767264000.0, 1767264600.0, 1767265200.0, 1767265800.0, 1767266400.0], "value": [820.68, 822.28, 819.35, 820.59, 822.81, 819.0, 820.09, 820.12, 817.74, 820.66, 817.98, 822.42, 817.74, 820.45, 819.84, 820.65, 820.83, 818.46, 820.73, 818.95, 821.15, 817.94, 818.7, 819.9, 821.26, 819.46, 819.77, 822.37, 821.23, 819.97, 819.02, 818.93, 819.22, 818.59, 820.58, 820.96, 827.32, 824.33, 825.85, 825.06, 829.38, 827.86, 823.26, 827.95, 827.5, 826.42, 827.69, 827.78, 826.01, 827.07, 825.29, 825.84, 826.13, 827.03, 825.9, 826.02, 826.64, 823.59, 826.52, 827.49], "mr": [0.07999999999992724, 1.6000000000000227, 2.92999999999995, 1.240000000000009, 2.2199999999999136, 3.8099999999999454, 1.0900000000000318, 0.029999999999972715, 2.3799999999999955, 2.919999999999959, 2.67999999999995, 4.439999999999941, 4.67999999999995, 2.7100000000000364, 0.6100000000000136, 0.8099999999999454, 0.18000000000006366, 2.3700000000000045, 2.269999999999982, 1.7799999999999727, 2.199999999999932, 3.2099999999999227, 0.7599999999999909, 1.1999999999999318, 1.3600000000000136, 1.7999999999999545, 0.30999999999994543, 2.6000000000000227, 1.1399999999999864, 1.259999999999991, 0.9500000000000455, 0.09000000000003183, 0.2900000000000773, 0.6299999999999955, 1.990000000000009, 0.37999999999999545, 6.360000000000014, 2.990000000000009, 1.5199999999999818, 0.7900000000000773, 4.32000000000005, 1.5199999999999818, 4.600000000000023, 4.690000000000055, 0.4500000000000455, 1.080000000000041, 1.2700000000000955, 0.08999999999991815, 1.7699999999999818, 1.0600000000000591, 1.7800000000000864, 0.5500000000000682, 0.2899999999999636, 0.8999999999999773, 1.1299999999999955, 0.12000000000000455, 0.6200000000000045, 3.0499999999999545, 2.92999999999995, 0.9700000000000273], "learning": [true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, true, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false, false], "signals": [[], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], [], ["beyond-limits"], [], ["beyond-limits"], [], ["beyond-limits"], ["beyond-limits"], [], ["beyond-limits"], ["beyond-limits"], ["beyond-limits"], ["beyond-limits"], ["beyond-limits"], ["beyond-limits"], ["beyond-limits"], [], [], [], [], [], [], [], [], [], []]}}',1767266401.0,1767266401.0,0,NULL,NULL,1767352801.0);
CREATE TABLE readings (
                stream TEXT NOT NULL,
                time REAL NOT NULL,
                value REAL NOT NULL,
                seq INTEGER,
                idx INTEGER,
                phase TEXT,
                z REAL,
                mr REAL, signals TEXT,
                PRIMARY KEY (stream, time)
            );
INSERT INTO "readings" VALUES('kiln-3/temp',1767225600.0,822.37,NULL,0,'learning',NULL,NULL,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767226200.0,821.77,NULL,1,'learning',NULL,6.00000000000022737367e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767226800.0,820.47,NULL,2,'learning',NULL,1.29999999999995452526e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767227400.0,819.42,NULL,3,'learning',NULL,1.0500000000000682121e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767228000.0,819.57,NULL,4,'learning',NULL,1.5000000000009094947e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767228600.0,815.82,NULL,5,'learning',NULL,3.75,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767229200.0,820.38,NULL,6,'learning',NULL,4.55999999999994543031e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767229800.0,819.16,NULL,7,'learning',NULL,1.22000000000002728484e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767230400.0,820.6,NULL,8,'learning',NULL,1.44000000000005456968e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767231000.0,820.68,NULL,9,'learning',NULL,7.99999999999272404238e-02,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767231600.0,822.28,NULL,10,'learning',NULL,1.60000000000002273736e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767232200.0,819.35,NULL,11,'learning',NULL,2.92999999999995,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767232800.0,820.59,NULL,12,'learning',NULL,1.24000000000000909494e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767233400.0,822.81,NULL,13,'learning',NULL,2.219999999999913598e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767234000.0,819.0,NULL,14,'learning',NULL,3.80999999999994543031e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767234600.0,820.09,NULL,15,'learning',NULL,1.09000000000003183231e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767235200.0,820.12,NULL,16,'learning',NULL,2.99999999999727151589e-02,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767235800.0,817.74,NULL,17,'learning',NULL,2.37999999999999545252e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767236400.0,820.66,NULL,18,'learning',NULL,2.91999999999995907273e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767237000.0,817.98,NULL,19,'learning',NULL,2.67999999999995,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767237600.0,822.42,NULL,20,'learning',NULL,4.43999999999994088284e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767238200.0,817.74,NULL,21,'learning',NULL,4.67999999999995,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767238800.0,820.45,NULL,22,'learning',NULL,2.71000000000003637978e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767239400.0,819.84,NULL,23,'learning',NULL,6.1000000000001364242e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767240000.0,820.65,NULL,24,'learning',NULL,8.09999999999945430317e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767240600.0,820.83,NULL,25,'monitoring',4.21411071795802172346e-01,1.80000000000063664629e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767241200.0,818.46,NULL,26,'monitoring',-0.907413090199917,2.37000000000000454747e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767241800.0,820.73,NULL,27,'monitoring',3.6534254175377611773e-01,2.2699999999999818101e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767242400.0,818.95,NULL,28,'monitoring',-6.32677292994046402974e-01,1.77999999999997271515e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767243000.0,821.15,NULL,29,'monitoring',6.00830367930209274796e-01,2.19999999999993178789e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767243600.0,817.94,NULL,30,'monitoring',-1.19896944641837621681e+00,3.20999999999992269295e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767244200.0,818.7,NULL,31,'monitoring',-7.72848618099079787135e-01,7.59999999999990905052e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767244800.0,819.9,NULL,32,'monitoring',-1.00026257594957757035e-01,1.19999999999993178789e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767245400.0,821.26,NULL,33,'monitoring',6.62505750976431606602e-01,1.36000000000001364242e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767246000.0,819.46,NULL,34,'monitoring',-3.46727789779783412971e-01,1.79999999999995452526e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767246600.0,819.77,NULL,35,'monitoring',-1.72915346649572559956e-01,3.09999999999945430317e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767247200.0,822.37,NULL,36,'monitoring',1.28486643444278758607e+00,2.60000000000002273736e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767247800.0,821.23,NULL,37,'monitoring',6.45685191963842886053e-01,1.13999999999998635757e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767248400.0,819.97,NULL,38,'monitoring',-6.07782865655203535792e-02,1.25999999999999090505e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767249000.0,819.02,NULL,39,'monitoring',-5.93429321964672795708e-01,9.50000000000045474735e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767249600.0,818.93,NULL,40,'monitoring',-6.43890999002502684156e-01,9.00000000000318323145e-02,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767250200.0,819.22,NULL,41,'monitoring',-4.81292261880620575453e-01,2.90000000000077307049e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767250800.0,818.59,NULL,42,'monitoring',-8.34524001145302229964e-01,6.29999999999995452526e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767251400.0,820.58,NULL,43,'monitoring',2.81239746690768788184e-01,1.99000000000000909494e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767252000.0,820.96,NULL,44,'monitoring',0.494300160850417,3.79999999999995452526e-01,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767225600.0,10.84,NULL,0,'monitoring',-5.33333333333333881043e-01,NULL,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767226200.0,11.14,NULL,1,'monitoring',4.66666666666668561447e-01,3.00000000000000710542e-01,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767226800.0,10.81,NULL,2,'monitoring',-6.33333333333331749415e-01,3.30000000000000071054e-01,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767227400.0,10.69,NULL,3,'monitoring',-1.03333333333333499126e+00,0.120000000000001,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767228000.0,11.26,NULL,4,'monitoring',0.866666666666666,5.70000000000000284217e-01,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767228600.0,11.19,NULL,5,'monitoring',6.33333333333331749415e-01,7.0000000000000284217e-02,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767229200.0,11.49,NULL,6,'monitoring',1.6333333333333341919e+00,3.00000000000000710542e-01,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767229800.0,11.45,NULL,7,'monitoring',1.49999999999999777955e+00,4.00000000000009237055e-02,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767230400.0,10.83,NULL,8,'monitoring',-5.66666666666666429819e-01,6.19999999999999218402e-01,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767231000.0,10.89,NULL,9,'monitoring',-3.66666666666664808893e-01,0.0600000000000005,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767231600.0,11.49,NULL,10,'monitoring',1.6333333333333341919e+00,5.99999999999999644728e-01,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767232200.0,10.69,NULL,11,'monitoring',-1.03333333333333499126e+00,8.00000000000000710542e-01,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767232800.0,11.12,NULL,12,'monitoring',3.9999999999999741318e-01,4.29999999999999715782e-01,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767233400.0,10.86,NULL,13,'monitoring',-4.66666666666668561447e-01,2.59999999999999786837e-01,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767234000.0,10.79,NULL,14,'monitoring',-7.0000000000000284217e-01,7.0000000000000284217e-02,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767234600.0,11.03,NULL,15,'monitoring',9.99999999999978683717e-02,2.40000000000000213162e-01,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767235200.0,11.35,NULL,16,'monitoring',1.16666666666666563045e+00,3.20000000000000284217e-01,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767235800.0,11.02,NULL,17,'monitoring',6.66666666666652502071e-02,3.30000000000000071054e-01,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767236400.0,10.97,NULL,18,'monitoring',-9.99999999999978683717e-02,4.99999999999989341858e-02,'');
INSERT INTO "readings" VALUES('dryer-1/moisture',1767237000.0,10.74,NULL,19,'monitoring',-0.866666666666666,2.30000000000000426325e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767252600.0,827.32,NULL,45,'monitoring',4.06025867152247421643e+00,6.36000000000001364242e+00,'beyond-limits');
INSERT INTO "readings" VALUES('kiln-3/temp',1767253200.0,824.33,NULL,46,'monitoring',2.38380962326627,2.99000000000000909494e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767253800.0,825.85,NULL,47,'monitoring',3.236051279904862632e+00,1.5199999999999818101e+00,'beyond-limits');
INSERT INTO "readings" VALUES('kiln-3/temp',1767254400.0,825.06,NULL,48,'monitoring',2.79310989257291364395e+00,7.90000000000077307049e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767255000.0,829.38,NULL,49,'monitoring',5.21527039038791873082e+00,4.32000000000005,'beyond-limits');
INSERT INTO "readings" VALUES('kiln-3/temp',1767255600.0,827.86,NULL,50,'monitoring',4.36302873374932609351e+00,1.5199999999999818101e+00,'beyond-limits');
INSERT INTO "readings" VALUES('kiln-3/temp',1767256200.0,823.26,NULL,51,'monitoring',1.78387635181669890194e+00,4.60000000000002273736e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767256800.0,827.95,NULL,52,'monitoring',4.41349041078715575991e+00,4.69000000000005456968e+00,'beyond-limits');
INSERT INTO "readings" VALUES('kiln-3/temp',1767257400.0,827.5,NULL,53,'monitoring',4.16118202559807048857e+00,4.50000000000045474735e-01,'beyond-limits');
INSERT INTO "readings" VALUES('kiln-3/temp',1767258000.0,826.42,NULL,54,'monitoring',3.55564190114430322964e+00,1.08000000000004092726e+00,'beyond-limits');
INSERT INTO "readings" VALUES('kiln-3/temp',1767258600.0,827.69,NULL,55,'monitoring',4.26771223267792620958e+00,1.27000000000009549694e+00,'beyond-limits');
INSERT INTO "readings" VALUES('kiln-3/temp',1767259200.0,827.78,NULL,56,'monitoring',4.31817390971569281532e+00,8.99999999999181454768e-02,'beyond-limits');
INSERT INTO "readings" VALUES('kiln-3/temp',1767259800.0,826.01,NULL,57,'monitoring',3.32576092797206612772e+00,1.7699999999999818101e+00,'beyond-limits');
INSERT INTO "readings" VALUES('kiln-3/temp',1767260400.0,827.07,NULL,58,'monitoring',3.92008734641744105431e+00,1.06000000000005911715e+00,'beyond-limits');
INSERT INTO "readings" VALUES('kiln-3/temp',1767261000.0,825.29,NULL,59,'monitoring',2.92206751166955491783e+00,1.78000000000008640199e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767261600.0,825.84,NULL,60,'monitoring',-4.21186141903278854492e-01,5.50000000000068212102e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767262200.0,826.13,NULL,61,'monitoring',-2.57161100069868919781e-01,2.89999999999963620211e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767262800.0,827.03,NULL,62,'monitoring',2.51882133206281888515e-01,8.99999999999977262632e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767263400.0,825.9,NULL,63,'monitoring',-3.87249926351565465498e-01,1.12999999999999545252e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767264000.0,826.02,NULL,64,'monitoring',-3.19377495248074405598e-01,1.20000000000004547473e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767264600.0,826.64,NULL,65,'monitoring',3.12967321199520281949e-02,6.20000000000004547473e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767265200.0,823.59,NULL,66,'monitoring',-1.69379422509368793292e+00,3.04999999999995452526e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767265800.0,826.52,NULL,67,'monitoring',-3.65756989835390317056e-02,2.92999999999995,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767266400.0,827.49,NULL,68,'monitoring',0.512059785769675,9.70000000000027284841e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767267000.0,827.63,NULL,69,'monitoring',5.91244288723737243529e-01,1.39999999999986357579e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767267600.0,827.07,NULL,70,'monitoring',2.74506276907488466765e-01,5.59999999999945430317e-01,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767268200.0,824.89,NULL,71,'monitoring',-9.58509554805921815123e-01,2.18000000000006366462e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767268800.0,827.01,NULL,72,'monitoring',2.40570061355710768102e-01,2.12000000000000454747e+00,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767269400.0,827.51,NULL,73,'monitoring',5.23371857620246183628e-01,0.5,'');
INSERT INTO "readings" VALUES('kiln-3/temp',1767270000.0,826.87,NULL,74,'monitoring',1.61385558401648587789e-01,6.39999999999986357579e-01,'');
CREATE TABLE schema_migrations (
            version INTEGER PRIMARY KEY,
            name TEXT NOT NULL,
            applied_at REAL
        );
INSERT INTO "schema_migrations" VALUES(1,'streams, baselines, readings, checkpoints, dead letters',1767225600.0);
INSERT INTO "schema_migrations" VALUES(2,'alerts, alert events, shelves, notification outbox',1767225600.0);
INSERT INTO "schema_migrations" VALUES(3,'file offsets',1767225600.0);
INSERT INTO "schema_migrations" VALUES(4,'the rules that signalled on each reading',1767225600.0);
INSERT INTO "schema_migrations" VALUES(5,'dead letters keep a bounded prefix with the payload''s size and SHA-256',1767225600.0);
INSERT INTO "schema_migrations" VALUES(6,'incidents: one live alert per stream, with the rules that joined it',1767225600.0);
INSERT INTO "schema_migrations" VALUES(7,'at most one live incident per stream',1767225600.0);
INSERT INTO "schema_migrations" VALUES(8,'floods: many incidents at once, told in one notice',1767225600.0);
CREATE TABLE shelves (
                id INTEGER PRIMARY KEY AUTOINCREMENT,
                stream TEXT NOT NULL,
                rule TEXT,
                created_at REAL NOT NULL,
                until REAL NOT NULL,
                reason TEXT NOT NULL,
                shelved_by TEXT NOT NULL,
                ended_at REAL,
                ended_by TEXT
            , pattern TEXT);
CREATE TABLE streams (
                id TEXT PRIMARY KEY,
                first_seen REAL NOT NULL,
                last_seen REAL NOT NULL,
                last_time REAL,
                last_value REAL,
                last_index INTEGER,
                phase TEXT
            );
INSERT INTO "streams" VALUES('kiln-3/temp',1767225601.0,1767270001.0,1767270000.0,826.87,74,'monitoring');
INSERT INTO "streams" VALUES('dryer-1/moisture',1767225601.0,1767237001.0,1767237000.0,10.74,19,'monitoring');
CREATE INDEX readings_by_time ON readings (time);
CREATE INDEX dead_letters_by_time ON dead_letters (received_at);
CREATE INDEX alerts_by_state ON alerts (state, stream);
CREATE INDEX alerts_by_stream_rule ON alerts (stream, rule, id);
CREATE INDEX alert_events_by_alert ON alert_events (alert_id, id);
CREATE TRIGGER alert_events_append_only_update BEFORE UPDATE ON alert_events
            BEGIN
                SELECT RAISE(ABORT, 'alert_events is append-only: add a new event instead');
            END;
CREATE TRIGGER alert_events_append_only_delete BEFORE DELETE ON alert_events
            BEGIN
                SELECT RAISE(ABORT, 'alert_events is append-only: events are never deleted');
            END;
CREATE INDEX shelves_live ON shelves (stream, until) WHERE ended_at IS NULL;
CREATE INDEX outbox_due ON outbox (next_attempt_at) WHERE delivered_at IS NULL;
CREATE UNIQUE INDEX incidents_one_live ON alerts (stream) WHERE state != 'cleared';
CREATE INDEX alerts_by_opened_at ON alerts (opened_at);
CREATE INDEX alerts_by_cleared_at ON alerts (cleared_at) WHERE cleared_at IS NOT NULL;
DELETE FROM "sqlite_sequence";
INSERT INTO "sqlite_sequence" VALUES('baselines',3);
INSERT INTO "sqlite_sequence" VALUES('alerts',1);
INSERT INTO "sqlite_sequence" VALUES('alert_events',7);
INSERT INTO "sqlite_sequence" VALUES('outbox',5);
COMMIT;
