"""The results folder: frozen inputs, the journal, the runs table, reading sources."""
