module sparsewatch

go 1.26
