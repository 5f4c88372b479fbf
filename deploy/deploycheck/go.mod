module github.com/ventderive/ventderive/deploy/deploycheck

go 1.26.0

require github.com/ventderive/ventderive v0.0.0

require gopkg.in/yaml.v3 v3.0.1

replace github.com/ventderive/ventderive => ../..
