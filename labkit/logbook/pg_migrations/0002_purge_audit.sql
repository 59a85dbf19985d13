-- labkit shared archive, migration 0002: the whole-session purge (personal data) and its audit log.
-- The purge is the one exception to append-only: a SECURITY DEFINER function owned by labkit_purger
-- (a role nobody logs in as), executable by the instructor role only, and every call is logged in
-- purge_log, which no application role (nor the owner) can change.

CREATE TABLE labkit.purge_log (
    id          bigserial PRIMARY KEY,
    session_id  text NOT NULL,
    section     text NOT NULL,
    "group"     text NOT NULL,
    kind        text NOT NULL,
    created_at  timestamptz NOT NULL,
    reason      text NOT NULL CHECK (btrim(reason) <> ''),
    purged_by   text NOT NULL DEFAULT session_user,
    purged_at   timestamptz NOT NULL DEFAULT clock_timestamp(),
    readings    bigint NOT NULL,
    events      bigint NOT NULL,
    captures    bigint NOT NULL
);

CREATE FUNCTION labkit.refuse_audit_change() RETURNS trigger
LANGUAGE plpgsql AS $$
BEGIN
  RAISE EXCEPTION 'the purge audit log is permanent: its rows are never changed or removed (%)', TG_OP
    USING ERRCODE = 'insufficient_privilege';
END $$;
CREATE TRIGGER purge_log_append_only BEFORE UPDATE OR DELETE ON labkit.purge_log
  FOR EACH ROW EXECUTE FUNCTION labkit.refuse_audit_change();
CREATE TRIGGER purge_log_no_truncate BEFORE TRUNCATE ON labkit.purge_log
  FOR EACH STATEMENT EXECUTE FUNCTION labkit.refuse_audit_change();

ALTER TABLE labkit.purge_log ENABLE ROW LEVEL SECURITY;
ALTER TABLE labkit.purge_log FORCE ROW LEVEL SECURITY;
DO $$ BEGIN
  EXECUTE format('CREATE POLICY owner_reads ON labkit.purge_log FOR SELECT TO %I USING (true)', current_user);
END $$;
CREATE POLICY purger_logs ON labkit.purge_log FOR INSERT TO labkit_purger WITH CHECK (true);
CREATE POLICY purger_reads ON labkit.purge_log FOR SELECT TO labkit_purger USING (true);
CREATE POLICY instructor_reads ON labkit.purge_log FOR SELECT TO labkit_instructor
  USING ((SELECT labkit.is_instructor()));
REVOKE ALL ON labkit.purge_log FROM PUBLIC;
GRANT SELECT ON labkit.purge_log TO labkit_instructor;
GRANT SELECT, INSERT ON labkit.purge_log TO labkit_purger;
GRANT USAGE ON SEQUENCE labkit.purge_log_id_seq TO labkit_purger;

-- what the purger may remove: whole sessions, through the function below only
GRANT SELECT, DELETE ON labkit.sessions, labkit.readings, labkit.events, labkit.captures,
  labkit.competing_readings TO labkit_purger;
GRANT EXECUTE ON FUNCTION labkit.is_instructor() TO labkit_purger;
DO $$
DECLARE t text;
BEGIN
  FOREACH t IN ARRAY ARRAY['sessions', 'readings', 'events', 'captures', 'competing_readings'] LOOP
    EXECUTE format('CREATE POLICY purger_deletes ON labkit.%I FOR DELETE TO labkit_purger USING (true)', t);
  END LOOP;
END $$;

CREATE FUNCTION labkit.purge_session(p_session text, p_reason text) RETURNS bigint
LANGUAGE plpgsql VOLATILE SECURITY DEFINER SET search_path = pg_catalog, labkit AS $$
DECLARE s record; n_readings bigint; n_events bigint; n_captures bigint; log_id bigint;
BEGIN
  IF NOT labkit.is_instructor() THEN
    RAISE EXCEPTION 'session % not purged: only an instructor login may purge (login %)', p_session, session_user
      USING ERRCODE = 'insufficient_privilege';
  END IF;
  IF p_reason IS NULL OR btrim(p_reason) = '' THEN
    RAISE EXCEPTION 'session % not purged: a purge needs a reason', p_session USING ERRCODE = 'check_violation';
  END IF;
  SELECT session_id, section, "group", kind, created_at INTO s FROM labkit.sessions WHERE session_id = p_session;
  IF NOT FOUND THEN
    RAISE EXCEPTION 'session % not purged: no such session', p_session USING ERRCODE = 'no_data_found';
  END IF;
  DELETE FROM labkit.competing_readings WHERE session_id = p_session;
  DELETE FROM labkit.readings WHERE session_id = p_session;
  GET DIAGNOSTICS n_readings = ROW_COUNT;
  DELETE FROM labkit.events WHERE session_id = p_session;
  GET DIAGNOSTICS n_events = ROW_COUNT;
  DELETE FROM labkit.captures WHERE session_id = p_session;
  GET DIAGNOSTICS n_captures = ROW_COUNT;
  DELETE FROM labkit.sessions WHERE session_id = p_session;
  INSERT INTO labkit.purge_log (session_id, section, "group", kind, created_at, reason, purged_by, readings, events,
                                captures)
  VALUES (s.session_id, s.section, s."group", s.kind, s.created_at, p_reason, session_user, n_readings, n_events,
          n_captures)
  RETURNING id INTO log_id;
  RETURN log_id;
END $$;

REVOKE ALL ON FUNCTION labkit.purge_session(text, text) FROM PUBLIC;
GRANT EXECUTE ON FUNCTION labkit.purge_session(text, text) TO labkit_instructor;
-- hand the function to labkit_purger (a new owner needs CREATE on the schema, for the hand-over only)
GRANT labkit_purger TO CURRENT_USER;
GRANT CREATE ON SCHEMA labkit TO labkit_purger;
ALTER FUNCTION labkit.purge_session(text, text) OWNER TO labkit_purger;
REVOKE CREATE ON SCHEMA labkit FROM labkit_purger;
REVOKE labkit_purger FROM CURRENT_USER;
