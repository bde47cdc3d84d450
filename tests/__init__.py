"""tdoa tests, one folder per package room (see DEVELOPERS.md)."""
