export default { render({ model, el }) { el.textContent = 'stratagem'; } };
