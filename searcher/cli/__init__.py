"""The command line: a thin shell that parses, calls the library, and prints."""
