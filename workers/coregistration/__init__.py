"""Co-registration (Nuth & Kääb and bias/tilt terms): pure estimates and the per-tile step."""
