// placeholder: the page's script
