"""Finding files, variables and coordinates (rules as data), units and calendars."""
