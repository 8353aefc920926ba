"""Study intake: reading the table, column roles, encoding, known rates, each site's own trial."""
