"""ionotrail test harness: channel model, emulators, runners, benchmarks and the CLI."""
