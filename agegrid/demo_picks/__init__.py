"""The bundled demo: the invented Veyra Basin, made by ``make_demo.py`` beside this file."""
