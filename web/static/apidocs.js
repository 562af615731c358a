// Starts Swagger UI on /docs (web/apidocs.py). A file, not an inline script, so the page keeps the
// app's Content-Security-Policy. The OpenAPI address comes from the page; nothing leaves the app
// (no validator badge, no remote configuration).
(function () {
  "use strict";
  var root = document.getElementById("swagger-ui");
  window.ui = window.SwaggerUIBundle({
    url: root.getAttribute("data-openapi-url"),
    domNode: root,
    deepLinking: true,
    validatorUrl: null,
    queryConfigEnabled: false,
    presets: [window.SwaggerUIBundle.presets.apis],
    layout: "BaseLayout",
  });
})();
