"""A run: where it lives (folders), what it searches (config), what each trial records (records), and the rules of its confirmation."""
