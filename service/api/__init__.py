"""HTTP API: routers (readings, health; alerts, thresholds, models), dependencies (deps),
request/response schemas (schemas, schemas_alerts)."""
