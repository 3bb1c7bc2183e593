"""model stage of detdiff (see DEVELOPERS.md)."""
