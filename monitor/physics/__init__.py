"""Physics: water and site properties (IAPWS-IF97), the lumped heat-balance model, its
exact steps, and the compiled arithmetic of the hottest loops. Imports nothing else of
``monitor``."""
