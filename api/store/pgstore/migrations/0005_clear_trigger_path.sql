-- The trigger function of migration 0004 resolves the cleared table by
-- the search path of the session that deletes a mark. It now keeps the
-- path it was made with, so a session with another path (an operator's,
-- say) records its clears beside the marks instead of failing.
ALTER FUNCTION record_clear() SET search_path FROM CURRENT;
