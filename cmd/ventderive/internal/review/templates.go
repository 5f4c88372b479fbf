package review

import "html/template"

type pageTemplates = template.Template

func parseTemplates() (*pageTemplates, error) {
	return template.New("").Funcs(template.FuncMap{"dec": func(n int) int { return n - 1 }}).
		ParseFS(assets, "templates/*.html")
}
