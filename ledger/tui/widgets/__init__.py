"""Small widgets and cell formatting shared by the screens."""
