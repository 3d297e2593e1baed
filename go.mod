module heedmap

go 1.26
