"""data stage of detdiff (see DEVELOPERS.md)."""
