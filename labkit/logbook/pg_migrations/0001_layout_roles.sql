-- labkit shared archive, migration 0001: the log tables, the roles and row-level security.
-- Run by the migration role (the login that owns schema labkit; it needs CREATEROLE to make the group roles).
-- Columns follow labkit/logbook/schema.py (format version 1); tests compare the two.

DO $$
DECLARE r text;
BEGIN
  FOREACH r IN ARRAY ARRAY['labkit_student', 'labkit_ta', 'labkit_instructor', 'labkit_purger'] LOOP
    IF NOT EXISTS (SELECT 1 FROM pg_roles WHERE rolname = r) THEN
      EXECUTE format('CREATE ROLE %I NOLOGIN', r);
    END IF;
  END LOOP;
END $$;

CREATE TABLE labkit.meta (key text PRIMARY KEY, value text NOT NULL);
INSERT INTO labkit.meta (key, value) VALUES ('format_version', '1'), ('created_at', clock_timestamp()::text);

-- who is who: logins mapped to their section, group and role (maintained by the migration role)
CREATE TABLE labkit.members (
    login    text NOT NULL,
    role     text NOT NULL CHECK (role IN ('student', 'ta', 'instructor')),
    section  text NOT NULL DEFAULT '',
    "group"  text NOT NULL DEFAULT '',
    added_at timestamptz NOT NULL DEFAULT clock_timestamp(),
    PRIMARY KEY (login, role, section, "group"),
    CHECK (role <> 'student' OR (section <> '' AND "group" <> '')),
    CHECK (role <> 'ta' OR section <> '')
);
CREATE INDEX members_by_login ON labkit.members (login);

CREATE TABLE labkit.sessions (
    session_id       text NOT NULL PRIMARY KEY,
    kind             text NOT NULL,
    state            text NOT NULL,
    section          text NOT NULL,
    "group"          text NOT NULL,
    cart             text NOT NULL,
    people           text NOT NULL,
    template_id      text NOT NULL,
    template_version text NOT NULL,
    template_sha256  text NOT NULL,
    template_text    text NOT NULL,
    bench_id         text NOT NULL,
    bench_version    text NOT NULL,
    bench_sha256     text NOT NULL,
    bench_text       text NOT NULL,
    cart_sha256      text NOT NULL DEFAULT '',
    cart_text        text NOT NULL DEFAULT '',
    labkit_version   text NOT NULL,
    mc_seed          bigint NOT NULL,
    mc_samples       bigint NOT NULL,
    created_at       timestamptz NOT NULL DEFAULT clock_timestamp(),
    created_by       text NOT NULL DEFAULT session_user,
    content_sha256   text NOT NULL,
    origin           jsonb,
    pushed_from      text NOT NULL DEFAULT ''
);
CREATE INDEX sessions_by_group ON labkit.sessions (section, "group");

CREATE TABLE labkit.readings (
    id             bigserial PRIMARY KEY,
    reading_id     text NOT NULL,
    revision       bigint NOT NULL CHECK (revision >= 0),
    supersedes     bigint NOT NULL,
    session_id     text NOT NULL REFERENCES labkit.sessions (session_id),
    section        text NOT NULL,
    "group"        text NOT NULL,
    cart           text NOT NULL,
    step_id        text NOT NULL,
    step_index     bigint NOT NULL,
    step_kind      text NOT NULL,
    location       text NOT NULL,
    quantity       text NOT NULL,
    unit           text NOT NULL,
    predicted      double precision,
    band_low       double precision,
    band_high      double precision,
    tolerance      double precision,
    measured       double precision,
    entered        text NOT NULL,
    form           text NOT NULL,
    meter_range    double precision,
    obtained       text NOT NULL,
    sensor         text NOT NULL DEFAULT '',
    verdict        text NOT NULL,
    diagnosis      text NOT NULL DEFAULT '',
    diagnosis_code text NOT NULL DEFAULT '',
    anchor         text NOT NULL,
    capture_id     text NOT NULL DEFAULT '',
    recorded_at    timestamptz NOT NULL DEFAULT clock_timestamp(),
    seq            bigint NOT NULL,
    recorded_by    text NOT NULL DEFAULT session_user,
    reason         text NOT NULL DEFAULT '',
    note           text NOT NULL DEFAULT '',
    content_sha256 text NOT NULL,
    origin         jsonb,
    pushed_from    text NOT NULL DEFAULT '',
    UNIQUE (reading_id, revision),
    CHECK (supersedes = revision - 1),
    CHECK (revision = 0 OR reason <> '')
);
CREATE INDEX readings_by_session ON labkit.readings (session_id, seq);
CREATE INDEX readings_by_group ON labkit.readings (section, "group");

CREATE TABLE labkit.events (
    id             bigserial PRIMARY KEY,
    session_id     text NOT NULL REFERENCES labkit.sessions (session_id),
    seq            bigint NOT NULL,
    "at"           timestamptz NOT NULL DEFAULT clock_timestamp(),
    "by"           text NOT NULL DEFAULT session_user,
    role           text NOT NULL,
    event          text NOT NULL,
    step_id        text NOT NULL DEFAULT '',
    detail         text NOT NULL DEFAULT '',
    content_sha256 text NOT NULL,
    origin         jsonb,
    pushed_from    text NOT NULL DEFAULT '',
    UNIQUE (session_id, seq)
);
CREATE UNIQUE INDEX events_by_origin ON labkit.events (content_sha256) WHERE origin IS NOT NULL;

CREATE TABLE labkit.roster (
    participant_id text NOT NULL PRIMARY KEY,
    name           text NOT NULL,
    section        text NOT NULL,
    "group"        text NOT NULL DEFAULT '',
    role           text NOT NULL,
    content_sha256 text NOT NULL,
    added_by       text NOT NULL DEFAULT session_user
);

CREATE TABLE labkit.captures (
    session_id text NOT NULL REFERENCES labkit.sessions (session_id),
    capture_id text NOT NULL,
    name       text NOT NULL,
    codec      text NOT NULL,
    size       bigint NOT NULL,
    data       bytea NOT NULL,
    stored_by  text NOT NULL DEFAULT session_user,
    PRIMARY KEY (session_id, capture_id)
);

CREATE TABLE labkit.competing_readings (
    LIKE labkit.readings INCLUDING DEFAULTS EXCLUDING IDENTITY,
    source_file text NOT NULL,
    merged_at   timestamptz NOT NULL DEFAULT clock_timestamp()
);
ALTER TABLE labkit.competing_readings ALTER COLUMN id SET DEFAULT nextval('labkit.readings_id_seq');
CREATE UNIQUE INDEX competing_unique ON labkit.competing_readings (content_sha256);

-- hand-in files uploaded by `labkit archive push`, one row per distinct file content
CREATE TABLE labkit.pushes (
    file_sha256 text PRIMARY KEY,
    file_name   text NOT NULL,
    pushed_by   text NOT NULL DEFAULT session_user,
    pushed_at   timestamptz NOT NULL DEFAULT clock_timestamp(),
    sessions    bigint NOT NULL,
    rows_added  bigint NOT NULL,
    duplicates  bigint NOT NULL
);

-- per-session sequence counters (not visible to any application role; written by the triggers only)
CREATE TABLE labkit.session_counters (session_id text PRIMARY KEY, next_seq bigint NOT NULL);

-- ---------------------------------------------------------------------------------------------------------------
-- helper functions: run as the owner, keyed on session_user (the login; a client cannot change it)
CREATE FUNCTION labkit.is_instructor() RETURNS boolean
LANGUAGE sql STABLE SECURITY DEFINER SET search_path = pg_catalog, labkit AS $$
  SELECT EXISTS (SELECT 1 FROM labkit.members WHERE login = session_user AND role = 'instructor')
$$;

CREATE FUNCTION labkit.ta_sections() RETURNS SETOF text
LANGUAGE sql STABLE SECURITY DEFINER SET search_path = pg_catalog, labkit AS $$
  SELECT section FROM labkit.members WHERE login = session_user AND role = 'ta'
$$;

CREATE FUNCTION labkit.student_groups() RETURNS SETOF text
LANGUAGE sql STABLE SECURITY DEFINER SET search_path = pg_catalog, labkit AS $$
  SELECT section || E'\x1f' || "group" FROM labkit.members WHERE login = session_user AND role = 'student'
$$;

-- the login's strongest role for one section and group, or NULL
CREATE FUNCTION labkit.role_for(p_section text, p_group text) RETURNS text
LANGUAGE sql STABLE SECURITY DEFINER SET search_path = pg_catalog, labkit AS $$
  SELECT CASE
    WHEN EXISTS (SELECT 1 FROM labkit.members WHERE login = session_user AND role = 'instructor') THEN 'instructor'
    WHEN EXISTS (SELECT 1 FROM labkit.members WHERE login = session_user AND role = 'ta'
                 AND section = p_section) THEN 'ta'
    WHEN EXISTS (SELECT 1 FROM labkit.members WHERE login = session_user AND role = 'student'
                 AND section = p_section AND "group" = p_group) THEN 'student'
  END
$$;

-- the latest state of a session (its last state:* event, else the state it was created in)
CREATE FUNCTION labkit.session_state(p_session text) RETURNS text
LANGUAGE sql STABLE SECURITY DEFINER SET search_path = pg_catalog, labkit AS $$
  SELECT coalesce(
    (SELECT substr(e.event, 7) FROM labkit.events e WHERE e.session_id = p_session AND e.event LIKE 'state:%'
     ORDER BY e.seq DESC LIMIT 1),
    (SELECT s.state FROM labkit.sessions s WHERE s.session_id = p_session))
$$;

CREATE FUNCTION labkit.can_read_session(p_session text) RETURNS boolean
LANGUAGE sql STABLE SECURITY DEFINER SET search_path = pg_catalog, labkit AS $$
  SELECT EXISTS (SELECT 1 FROM labkit.sessions s WHERE s.session_id = p_session
                 AND labkit.role_for(s.section, s."group") IS NOT NULL)
$$;

-- a reading (or capture) may be added: staff of the section at any time; a student of the group while it is open
CREATE FUNCTION labkit.can_add_reading(p_session text, p_section text, p_group text) RETURNS boolean
LANGUAGE plpgsql STABLE SECURITY DEFINER SET search_path = pg_catalog, labkit AS $$
DECLARE s record; who text;
BEGIN
  SELECT section, "group" INTO s FROM labkit.sessions WHERE session_id = p_session;
  IF NOT FOUND OR s.section <> p_section OR s."group" <> p_group THEN
    RETURN false;
  END IF;
  who := labkit.role_for(s.section, s."group");
  RETURN who IN ('ta', 'instructor') OR (who = 'student' AND labkit.session_state(p_session) = 'open');
END $$;

-- an event may be added: staff of the section; a student of the group opens a planned session,
-- submits an open one, and moves through steps of an open one
CREATE FUNCTION labkit.can_add_event(p_session text, p_event text) RETURNS boolean
LANGUAGE plpgsql STABLE SECURITY DEFINER SET search_path = pg_catalog, labkit AS $$
DECLARE s record; who text; st text;
BEGIN
  SELECT section, "group" INTO s FROM labkit.sessions WHERE session_id = p_session;
  IF NOT FOUND THEN
    RETURN false;
  END IF;
  who := labkit.role_for(s.section, s."group");
  IF who IN ('ta', 'instructor') THEN
    RETURN true;
  ELSIF who IS DISTINCT FROM 'student' THEN
    RETURN false;
  END IF;
  st := labkit.session_state(p_session);
  IF p_event = 'state:open' THEN
    RETURN st = 'planned';
  ELSIF p_event = 'state:submitted' THEN
    RETURN st = 'open';
  ELSIF p_event LIKE 'state:%' THEN
    RETURN false;
  END IF;
  RETURN st = 'open';
END $$;

CREATE FUNCTION labkit.can_create_session(p_section text, p_group text, p_state text) RETURNS boolean
LANGUAGE sql STABLE SECURITY DEFINER SET search_path = pg_catalog, labkit AS $$
  SELECT coalesce(labkit.role_for(p_section, p_group) IN ('ta', 'instructor')
                  OR (labkit.role_for(p_section, p_group) = 'student' AND p_state IN ('planned', 'open')), false)
$$;

CREATE FUNCTION labkit.next_seq(p_session text) RETURNS bigint
LANGUAGE sql VOLATILE SECURITY DEFINER SET search_path = pg_catalog, labkit AS $$
  INSERT INTO labkit.session_counters AS c (session_id, next_seq) VALUES (p_session, 1)
  ON CONFLICT (session_id) DO UPDATE SET next_seq = c.next_seq + 1
  RETURNING next_seq - 1
$$;

CREATE FUNCTION labkit.is_staff() RETURNS boolean
LANGUAGE sql STABLE SECURITY DEFINER SET search_path = pg_catalog, labkit AS $$
  SELECT EXISTS (SELECT 1 FROM labkit.members WHERE login = session_user AND role IN ('ta', 'instructor'))
$$;

-- ---------------------------------------------------------------------------------------------------------------
-- server-assigned columns: whatever the client sent, the login, the server clock and the session counter win
CREATE FUNCTION labkit.stamp_reading() RETURNS trigger
LANGUAGE plpgsql SECURITY DEFINER SET search_path = pg_catalog, labkit AS $$
DECLARE latest bigint; other text;
BEGIN
  NEW.recorded_by := session_user;
  NEW.recorded_at := clock_timestamp();
  IF NOT labkit.is_staff() THEN
    NEW.origin := NULL;
    NEW.pushed_from := '';
  END IF;
  IF NEW.revision > 0 THEN
    SELECT max(revision), min(session_id) INTO latest, other FROM labkit.readings WHERE reading_id = NEW.reading_id;
    IF latest IS NULL THEN
      RAISE EXCEPTION 'correction of reading % not recorded: the reading has no revision 0 in this archive',
        NEW.reading_id USING ERRCODE = 'check_violation';
    ELSIF NEW.revision <> latest + 1 THEN
      RAISE EXCEPTION 'correction of reading % not recorded: revision % does not follow the latest recorded '
        'revision % (someone else corrected it first?)', NEW.reading_id, NEW.revision, latest
        USING ERRCODE = 'check_violation';
    ELSIF other <> NEW.session_id THEN
      RAISE EXCEPTION 'correction of reading % not recorded: it belongs to session %, not %',
        NEW.reading_id, other, NEW.session_id USING ERRCODE = 'check_violation';
    END IF;
  END IF;
  NEW.seq := labkit.next_seq(NEW.session_id);
  RETURN NEW;
END $$;

CREATE FUNCTION labkit.stamp_event() RETURNS trigger
LANGUAGE plpgsql SECURITY DEFINER SET search_path = pg_catalog, labkit AS $$
DECLARE s record;
BEGIN
  NEW."by" := session_user;
  NEW."at" := clock_timestamp();
  SELECT section, "group" INTO s FROM labkit.sessions WHERE session_id = NEW.session_id;
  IF FOUND THEN
    NEW.role := coalesce(labkit.role_for(s.section, s."group"), NEW.role);
  END IF;
  IF NOT labkit.is_staff() THEN
    NEW.origin := NULL;
    NEW.pushed_from := '';
  END IF;
  NEW.seq := labkit.next_seq(NEW.session_id);
  RETURN NEW;
END $$;

CREATE FUNCTION labkit.stamp_session() RETURNS trigger
LANGUAGE plpgsql SECURITY DEFINER SET search_path = pg_catalog, labkit AS $$
BEGIN
  NEW.created_by := session_user;
  NEW.created_at := clock_timestamp();
  IF NOT labkit.is_staff() THEN
    NEW.origin := NULL;
    NEW.pushed_from := '';
  END IF;
  RETURN NEW;
END $$;

CREATE FUNCTION labkit.stamp_login() RETURNS trigger
LANGUAGE plpgsql SECURITY DEFINER SET search_path = pg_catalog, labkit AS $$
BEGIN
  IF TG_TABLE_NAME = 'roster' THEN
    NEW.added_by := session_user;
  ELSIF TG_TABLE_NAME = 'captures' THEN
    NEW.stored_by := session_user;
  ELSIF TG_TABLE_NAME = 'pushes' THEN
    NEW.pushed_by := session_user;
    NEW.pushed_at := clock_timestamp();
  END IF;
  RETURN NEW;
END $$;

CREATE TRIGGER readings_stamp BEFORE INSERT ON labkit.readings FOR EACH ROW EXECUTE FUNCTION labkit.stamp_reading();
CREATE TRIGGER events_stamp BEFORE INSERT ON labkit.events FOR EACH ROW EXECUTE FUNCTION labkit.stamp_event();
CREATE TRIGGER sessions_stamp BEFORE INSERT ON labkit.sessions FOR EACH ROW EXECUTE FUNCTION labkit.stamp_session();
CREATE TRIGGER roster_stamp BEFORE INSERT ON labkit.roster FOR EACH ROW EXECUTE FUNCTION labkit.stamp_login();
CREATE TRIGGER captures_stamp BEFORE INSERT ON labkit.captures FOR EACH ROW EXECUTE FUNCTION labkit.stamp_login();
CREATE TRIGGER pushes_stamp BEFORE INSERT ON labkit.pushes FOR EACH ROW EXECUTE FUNCTION labkit.stamp_login();

-- append-only, whatever the privileges: only the purge function's role may delete (whole sessions)
CREATE FUNCTION labkit.refuse_change() RETURNS trigger
LANGUAGE plpgsql AS $$
BEGIN
  IF TG_OP = 'DELETE' AND current_user = 'labkit_purger' THEN
    RETURN OLD;
  END IF;
  RAISE EXCEPTION 'the logbook is append-only: % rows are never changed or removed (%); a correction is a new '
    'revision', TG_TABLE_NAME, TG_OP USING ERRCODE = 'insufficient_privilege';
END $$;

DO $$
DECLARE t text;
BEGIN
  FOREACH t IN ARRAY ARRAY['sessions', 'readings', 'events', 'roster', 'captures', 'competing_readings', 'pushes']
  LOOP
    EXECUTE format('CREATE TRIGGER %I BEFORE UPDATE OR DELETE ON labkit.%I FOR EACH ROW '
                   'EXECUTE FUNCTION labkit.refuse_change()', t || '_append_only', t);
    EXECUTE format('CREATE TRIGGER %I BEFORE TRUNCATE ON labkit.%I FOR EACH STATEMENT '
                   'EXECUTE FUNCTION labkit.refuse_change()', t || '_no_truncate', t);
  END LOOP;
END $$;

-- ---------------------------------------------------------------------------------------------------------------
-- privileges: SELECT and INSERT only; UPDATE, DELETE and TRUNCATE from nobody of the application
REVOKE ALL ON SCHEMA labkit FROM PUBLIC;
REVOKE ALL ON ALL TABLES IN SCHEMA labkit FROM PUBLIC;
REVOKE ALL ON ALL SEQUENCES IN SCHEMA labkit FROM PUBLIC;
REVOKE ALL ON ALL FUNCTIONS IN SCHEMA labkit FROM PUBLIC;
GRANT USAGE ON SCHEMA labkit TO labkit_student, labkit_ta, labkit_instructor, labkit_purger;
GRANT SELECT ON labkit.meta, labkit.members TO labkit_student, labkit_ta, labkit_instructor;
GRANT SELECT, INSERT ON labkit.sessions, labkit.readings, labkit.events, labkit.captures
  TO labkit_student, labkit_ta, labkit_instructor;
GRANT SELECT, INSERT ON labkit.roster, labkit.competing_readings, labkit.pushes TO labkit_ta, labkit_instructor;
GRANT SELECT ON labkit.roster TO labkit_student;
GRANT USAGE ON SEQUENCE labkit.readings_id_seq, labkit.events_id_seq TO labkit_student, labkit_ta, labkit_instructor;
GRANT EXECUTE ON FUNCTION labkit.is_instructor(), labkit.ta_sections(), labkit.student_groups(),
  labkit.role_for(text, text), labkit.session_state(text), labkit.can_read_session(text),
  labkit.can_add_reading(text, text, text), labkit.can_add_event(text, text),
  labkit.can_create_session(text, text, text), labkit.is_staff()
  TO labkit_student, labkit_ta, labkit_instructor;

-- ---------------------------------------------------------------------------------------------------------------
-- row-level security, forced so that the owner is bound too
DO $$
DECLARE t text;
BEGIN
  FOREACH t IN ARRAY ARRAY['meta', 'members', 'sessions', 'readings', 'events', 'roster', 'captures',
                           'competing_readings', 'pushes', 'session_counters'] LOOP
    EXECUTE format('ALTER TABLE labkit.%I ENABLE ROW LEVEL SECURITY', t);
    EXECUTE format('ALTER TABLE labkit.%I FORCE ROW LEVEL SECURITY', t);
  END LOOP;
  -- the owner (migrations, the definer helpers) reads everything and writes nothing of the log
  FOREACH t IN ARRAY ARRAY['meta', 'members', 'sessions', 'readings', 'events', 'roster', 'captures',
                           'competing_readings', 'pushes'] LOOP
    EXECUTE format('CREATE POLICY owner_reads ON labkit.%I FOR SELECT TO %I USING (true)', t, current_user);
    EXECUTE format('CREATE POLICY purger_reads ON labkit.%I FOR SELECT TO labkit_purger USING (true)', t);
  END LOOP;
  EXECUTE format('CREATE POLICY owner_counts ON labkit.session_counters FOR ALL TO %I USING (true) '
                 'WITH CHECK (true)', current_user);
  EXECUTE format('CREATE POLICY owner_manages ON labkit.members FOR ALL TO %I USING (true) WITH CHECK (true)',
                 current_user);
  EXECUTE format('CREATE POLICY owner_writes_meta ON labkit.meta FOR INSERT TO %I WITH CHECK (true)', current_user);
END $$;

CREATE POLICY everyone_reads ON labkit.meta FOR SELECT TO labkit_student, labkit_ta, labkit_instructor USING (true);
CREATE POLICY own_or_staff ON labkit.members FOR SELECT TO labkit_student, labkit_ta, labkit_instructor
  USING (login = session_user OR (SELECT labkit.is_instructor()) OR section IN (SELECT labkit.ta_sections()));

-- read: instructor everything, a TA their sections, a student their group
CREATE POLICY reads ON labkit.sessions FOR SELECT TO labkit_student, labkit_ta, labkit_instructor
  USING ((SELECT labkit.is_instructor()) OR section IN (SELECT labkit.ta_sections())
         OR section || E'\x1f' || "group" IN (SELECT labkit.student_groups()));
CREATE POLICY reads ON labkit.readings FOR SELECT TO labkit_student, labkit_ta, labkit_instructor
  USING ((SELECT labkit.is_instructor()) OR section IN (SELECT labkit.ta_sections())
         OR section || E'\x1f' || "group" IN (SELECT labkit.student_groups()));
CREATE POLICY reads ON labkit.competing_readings FOR SELECT TO labkit_ta, labkit_instructor
  USING ((SELECT labkit.is_instructor()) OR section IN (SELECT labkit.ta_sections()));
CREATE POLICY reads ON labkit.roster FOR SELECT TO labkit_student, labkit_ta, labkit_instructor
  USING ((SELECT labkit.is_instructor()) OR section IN (SELECT labkit.ta_sections())
         OR section || E'\x1f' || "group" IN (SELECT labkit.student_groups()));
CREATE POLICY reads ON labkit.events FOR SELECT TO labkit_student, labkit_ta, labkit_instructor
  USING (session_id IN (SELECT s.session_id FROM labkit.sessions s));
CREATE POLICY reads ON labkit.captures FOR SELECT TO labkit_student, labkit_ta, labkit_instructor
  USING (session_id IN (SELECT s.session_id FROM labkit.sessions s));
CREATE POLICY reads ON labkit.pushes FOR SELECT TO labkit_ta, labkit_instructor USING (true);

-- write: every insert is checked against the login's membership and the session's state
CREATE POLICY adds ON labkit.sessions FOR INSERT TO labkit_student, labkit_ta, labkit_instructor
  WITH CHECK (labkit.can_create_session(section, "group", state));
CREATE POLICY adds ON labkit.readings FOR INSERT TO labkit_student, labkit_ta, labkit_instructor
  WITH CHECK (labkit.can_add_reading(session_id, section, "group"));
CREATE POLICY adds ON labkit.events FOR INSERT TO labkit_student, labkit_ta, labkit_instructor
  WITH CHECK (labkit.can_add_event(session_id, event));
CREATE POLICY adds ON labkit.captures FOR INSERT TO labkit_student, labkit_ta, labkit_instructor
  WITH CHECK (labkit.can_add_reading(session_id,
              (SELECT s.section FROM labkit.sessions s WHERE s.session_id = captures.session_id),
              (SELECT s."group" FROM labkit.sessions s WHERE s.session_id = captures.session_id)));
CREATE POLICY adds ON labkit.roster FOR INSERT TO labkit_ta, labkit_instructor
  WITH CHECK ((SELECT labkit.is_instructor()) OR section IN (SELECT labkit.ta_sections()));
CREATE POLICY adds ON labkit.competing_readings FOR INSERT TO labkit_ta, labkit_instructor
  WITH CHECK ((SELECT labkit.is_instructor()) OR section IN (SELECT labkit.ta_sections()));
CREATE POLICY adds ON labkit.pushes FOR INSERT TO labkit_ta, labkit_instructor WITH CHECK (true);
