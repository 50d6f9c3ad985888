module github.com/tallyward/tallyward

go 1.26
