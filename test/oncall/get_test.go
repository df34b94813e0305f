package oncall

import (
	"io"
	"net/http"
)

// get returns the body of GET url, or the error, for failure messages.
func get(url string) string {
	resp, err := http.Get(url)
	if err != nil {
		return err.Error()
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return string(b)
}
