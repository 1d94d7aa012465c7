-- PostgreSQL set-up for ohmline (run as a superuser: psql -f postgres-setup.sql).
-- The service applies its own migrations at start.
CREATE ROLE ohmline LOGIN PASSWORD 'change-me';
CREATE DATABASE ohmline OWNER ohmline;
