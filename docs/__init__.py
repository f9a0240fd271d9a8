"""docs/formats.md and the JSON Schemas, installed as filmmap.docs (printed by `filmmap formats`)."""
