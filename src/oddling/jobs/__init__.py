"""Jobs: each public entry point (fit, score, evaluate, tune, maintenance, monitoring) orchestrates
intake, representation, detector and bank. The CLI only parses and prints around them."""
