"""The file edges: readings, bench profiles, specs, results files and the SQLite history."""
