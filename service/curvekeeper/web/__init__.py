"""The technician's pages: plain HTML, our own small scripts, and the plotting library
served from its installed package. Nothing is loaded from elsewhere at run time."""
