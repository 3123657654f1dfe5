"""The Hydra configuration of simfield, installed as package data (see simfield.config.CONF_DIR)."""
