"""Field-profile plug-ins: radial profiles and temporal envelopes, with a registry."""
