"""Data stage: COCO ingest and lint, the decoded image cache, and the generated demo scenarios."""
