"""Reading a request: models, tables, row checks, CSV, problems (the first step of the flow)."""
