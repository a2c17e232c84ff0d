// Starts the interactive API documentation on /docs. A file of its own, not an inline script:
// the pages' Content-Security-Policy allows scripts from the service itself only.
window.addEventListener("load", function () {
  window.ui = SwaggerUIBundle({
    url: "/openapi.json",
    dom_id: "#api-docs",
    deepLinking: true,
    presets: [SwaggerUIBundle.presets.apis],
    layout: "BaseLayout",
  });
});
