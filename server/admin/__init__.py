"""Staff account administration and the audit trail reader (admins only)."""
