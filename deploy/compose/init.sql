-- Demo warehouse for deploy/compose.yaml: a small, deterministic `deliveries` table (no
-- random(): every value is arithmetic on the row number) and a read-only role for sluice.
-- Runs once, as the postgres superuser, when the volume is first initialised.

DO $$
BEGIN
    IF NOT EXISTS (SELECT FROM pg_roles WHERE rolname = 'sluice_reader') THEN
        CREATE ROLE sluice_reader LOGIN PASSWORD 'sluice-demo-only';
    END IF;
END $$;

CREATE TABLE public.deliveries (
    parcel_id          bigint PRIMARY KEY,
    delivered_at       timestamptz NOT NULL,
    depot              text NOT NULL,
    region             text NOT NULL,
    vehicle            text NOT NULL,
    distance_km        double precision,
    weight_kg          double precision,
    fee                numeric(10, 2) NOT NULL,
    delay_min          integer,
    on_time            boolean
);

INSERT INTO public.deliveries
SELECT i,
       timestamptz '2025-01-01 06:00:00+00'
           + make_interval(days => (i * 37) % 365, mins => (i * 53) % 900),
       (ARRAY['North Yard', 'Harbour', 'Quillmoor', 'Emberfield'])[1 + i % 4],
       (ARRAY['North', 'South', 'East', 'West'])[1 + (i / 4) % 4],
       (ARRAY['bike', 'cargo bike', 'van', 'van', 'truck'])[1 + (i * 7) % 5],
       CASE WHEN i % 97 = 0 THEN NULL ELSE round((0.3 + 60 * power((i * 7919) % 4000 / 4000.0, 2.5))::numeric, 2) END,
       round((0.2 + (i * 104729) % 2500 / 100.0)::numeric, 2),
       round((3.2 + (i * 7919) % 4000 * 0.0042 + (i * 104729) % 2500 * 0.0028)::numeric, 2),
       CASE WHEN i % 31 = 0 THEN NULL ELSE (i * 389) % 60 - 15 END,
       CASE WHEN i % 31 = 0 THEN NULL ELSE (i * 389) % 60 - 15 <= 15 END
FROM generate_series(1, 20000) AS g(i);

ANALYZE public.deliveries;

DO $$
BEGIN
    EXECUTE format('GRANT CONNECT ON DATABASE %I TO sluice_reader', current_database());
END $$;
GRANT USAGE ON SCHEMA public TO sluice_reader;
GRANT SELECT ON public.deliveries TO sluice_reader;
ALTER ROLE sluice_reader SET default_transaction_read_only = on;
