"""analysis stage of detdiff (see DEVELOPERS.md)."""
